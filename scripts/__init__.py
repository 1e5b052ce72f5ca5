"""shoal's benchmark and study scripts, a package so that they share code by import.

Run them from the repository's root as modules, e.g. ``.venv/bin/python -m
scripts.bench_e2e --stages`` (``./scripts/bench`` does so for ``scripts.bench``).
``scripts.synthetic`` draws the seeded random mixtures the benchmarks share;
``scripts.lognormal`` is the seeded log-normal stream that the transform tests use too.
"""
