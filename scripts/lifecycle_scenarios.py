"""Segment lifecycle on randomised seeded scenarios, one table per kind.

Each scenario draws K (3-6) well-separated Gaussians in D (2-8) features, the smallest
weight at least 8%, and runs the real pipeline in-process on Parquet drops of 10,000
rows with the shipped defaults except ``half_life_rows: 50000`` and ``warmup_rows:
5000`` (``tests/support/_scenarios.py``; the suite runs a few of the same seeds).

Kinds:

vanish      a component of weight >= 8% stops appearing (row 50,000-60,000): rows until its
            segment retires, and shape alerts (mean_shift, spread_ratio) on it after
birth       a new group of 8% of the rows appears (row 40,000-50,000): rows until its
            ``born`` event, the event's mean error (Mahalanobis distance under the
            group's true covariance) and share
spread      one component's spread doubles (row 40,000-50,000): lifecycle events in
            the 100,000 rows after (a birth there is a flap)
stationary  300,000 rows (``--stationary-rows``) of an unchanging mixture: every alert
            and lifecycle event
lumped      the model starts from the core's warm-up fit with one component fewer:
            rows until the segment over two components splits, and how far the two
            parts end from the true means (Mahalanobis, true covariances)

Usage: ``python -m scripts.lifecycle_scenarios [--kind vanish] [--seeds 20]`` (from the repository root).
Prints a table; asserts nothing.
"""
from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

from scripts.tests_support import load  # noqa: E402

_scenarios = load("_scenarios")


def _vanish(seeds, folder):
    print(f"{'seed':>4} {'K':>2} {'D':>2} {'weight':>6} {'retired after':>13} "
          f"{'shape alerts':>12} {'other events':>12} {'s':>5}")
    delays, shape = [], 0
    for seed in seeds:
        t0 = time.perf_counter()
        r = _scenarios.vanish(folder / f"vanish-{seed}", seed)
        delays.append(r["delay"])
        shape += bool(r["shape_alerts"])
        print(f"{seed:>4} {r['K']:>2} {r['D']:>2} {r['weight']:>6.3f} "
              f"{r['delay'] if r['delay'] is not None else 'never':>13} "
              f"{len(r['shape_alerts']):>12} {len(r['other_events']):>12} "
              f"{time.perf_counter() - t0:>5.1f}")
    done = [d for d in delays if d is not None]
    print(f"retired within 50,000 rows: {sum(d <= 50_000 for d in done)} of {len(seeds)}; "
          f"delays {min(done) if done else '-'}-{max(done) if done else '-'}; "
          f"scenarios with a shape alert after the vanishing: {shape}")


def _birth(seeds, folder):
    print(f"{'seed':>4} {'K':>2} {'D':>2} {'born after':>10} {'mean error':>10} "
          f"{'share':>6} {'other events':>12}")
    good, runs = 0, []
    for seed in seeds:
        r = _scenarios.birth(folder / f"birth-{seed}", seed)
        runs.append(r)
        ok = r["error"] is not None and r["error"] <= 0.5 and abs(r["share"] - 0.08) <= 0.03
        good += ok
        print(f"{seed:>4} {r['K']:>2} {r['D']:>2} "
              f"{r['delay'] if r['delay'] is not None else 'never':>10} "
              f"{r['error'] if r['error'] is not None else float('nan'):>10.3f} "
              f"{r['share'] if r['share'] is not None else float('nan'):>6.3f} "
              f"{str(r['other_events']):>12}")
    born = [r for r in runs if r["delay"] is not None]
    print(f"born with mean within 0.5 (Mahalanobis) and share within 0.03 of 8%: "
          f"{good} of {len(seeds)}")
    if born:
        print(f"born after {min(r['delay'] for r in born)}-{max(r['delay'] for r in born)} "
              f"rows; mean error up to {max(r['error'] for r in born):.3f}; shares "
              f"{min(r['share'] for r in born):.3f}-{max(r['share'] for r in born):.3f}; "
              f"other events in {sum(bool(r['other_events']) for r in runs)} scenarios")


def _spread(seeds, folder):
    print(f"{'seed':>4} {'K':>2} {'D':>2}  lifecycle events (kind, segment, rows after)")
    births = flaps = 0
    for seed in seeds:
        r = _scenarios.spread(folder / f"spread-{seed}", seed)
        born = {e[1] for e in r["events"] if e[0] == "born"}
        births += bool(born)
        flaps += any(e[0] == "merged" and e[1] in born for e in r["events"])
        print(f"{seed:>4} {r['K']:>2} {r['D']:>2}  {r['events']}")
    print(f"scenarios with a birth: {births} of {len(seeds)}; born and merged back: {flaps}")


STATIONARY_ROWS = [300_000]


def _stationary(seeds, folder):
    print(f"{'seed':>4} {'K':>2} {'D':>2} {'smallest':>8}  alerts (kind, status, segment, "
          f"statistic, row)")
    noisy = 0
    for seed in seeds:
        r = _scenarios.stationary(folder / f"stationary-{seed}", seed,
                                  rows=STATIONARY_ROWS[0])
        noisy += bool(r["alerts"])
        print(f"{seed:>4} {r['K']:>2} {r['D']:>2} {min(r['weights']):>8.3f}  {r['alerts']}")
    print(f"{STATIONARY_ROWS[0]:,}-row stationary scenarios with any alert or lifecycle "
          f"event: {noisy} of {len(seeds)}")


def _lumped(seeds, folder):
    print(f"{'seed':>4} {'K':>2} {'D':>2} {'lumped':>7} {'split after':>11} "
          f"{'mean errors':>12}  lifecycle events")
    good = 0
    for seed in seeds:
        r = _scenarios.lumped(folder / f"lumped-{seed}", seed)
        if r["lumped"] is None:
            print(f"{seed:>4} {r['K']:>2} {r['D']:>2}  (the fit with one fewer lumped nothing)")
            continue
        ok = r["delay"] is not None and r["delay"] <= 50_000 and max(r["errors"]) <= 0.2
        good += ok
        print(f"{seed:>4} {r['K']:>2} {r['D']:>2} {str(r['lumped']):>7} "
              f"{r['delay'] if r['delay'] is not None else 'never':>11} "
              f"{' '.join(f'{e:.3f}' for e in r['errors']):>12}  {r['events']}")
    print(f"lumped segment split within 50,000 rows, both parts within 0.2 sd of the "
          f"truth: {good} of {len(seeds)}")


KINDS = {"vanish": _vanish, "birth": _birth, "spread": _spread, "stationary": _stationary,
         "lumped": _lumped}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--kind", choices=sorted(KINDS), action="append",
                    help="scenario kind (repeatable; default: all)")
    ap.add_argument("--seeds", type=int, default=20, help="scenarios per kind (default 20)")
    ap.add_argument("--first-seed", type=int, default=0)
    ap.add_argument("--stationary-rows", type=int, default=300_000,
                    help="rows of each stationary scenario (default 300,000)")
    args = ap.parse_args(argv)
    STATIONARY_ROWS[0] = args.stationary_rows
    seeds = list(range(args.first_seed, args.first_seed + args.seeds))
    with tempfile.TemporaryDirectory() as tmp:
        for kind in args.kind or sorted(KINDS):
            print(f"\n== {kind}: {len(seeds)} seeds from {seeds[0]}")
            KINDS[kind](seeds, Path(tmp))
    return 0


if __name__ == "__main__":
    sys.exit(main())
