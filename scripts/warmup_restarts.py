"""Warm-up fits against the best of 20 restarts of scikit-learn's EM, seed by seed.

Each seed draws a warm-up buffer of 5,000 rows from K (3-6) well-separated Gaussians
in D (2-8) features, the smallest weight 8% (``tests/support/_scenarios.py``), fits it with
``shoal.core.initialise`` (the service's defaults: ``n_init`` 5, full covariances) and
with ``sklearn.mixture.GaussianMixture(n_init=20, max_iter=500, tol=1e-6)`` as the
reference, and prints the mean log-likelihood per row of each and their difference.
The target: within 0.01 nats/row of the reference in at least 99% of seeds.

Usage: ``python -m scripts.warmup_restarts [--seeds 200] [--first-seed 0]`` (from the repository root). Prints a
table; asserts nothing.
"""
from __future__ import annotations

import argparse
import sys
import time
import warnings
from pathlib import Path

import numpy as np

from scripts.tests_support import load  # noqa: E402

warmup_gap = load("_scenarios").warmup_gap


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seeds", type=int, default=200)
    ap.add_argument("--first-seed", type=int, default=0)
    ap.add_argument("--n-init", type=int, default=5, help="shoal's restarts (default 5)")
    args = ap.parse_args(argv)
    print(f"{'seed':>4} {'K':>2} {'D':>2} {'shoal':>9} {'sklearn':>9} {'gap':>8} "
          f"{'shoal s':>7} {'sklearn s':>9}")
    gaps = []
    for seed in range(args.first_seed, args.first_seed + args.seeds):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            r = warmup_gap(seed, n_init=args.n_init)
        gaps.append(r["gap"])
        print(f"{seed:>4} {r['K']:>2} {r['D']:>2} {r['ours']:>9.4f} {r['reference']:>9.4f} "
              f"{r['gap']:>8.4f} {r['ours_s']:>7.2f} {r['reference_s']:>9.2f}", flush=True)
    gaps = np.array(gaps)
    within = float(np.mean(gaps <= 0.01))
    print(f"within 0.01 nats/row of the best of 20 restarts: {np.sum(gaps <= 0.01)} of "
          f"{len(gaps)} ({within:.1%}); largest gap {gaps.max():.4f}; median {np.median(gaps):.5f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
