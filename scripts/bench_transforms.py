"""Transforms on log-normal data: segments recovered, quiet on a stationary stream,
a doubled median found; with the rate of the transformed pipeline against the same
pipeline fed the logged rows (the anchor, same run).

Seeded invented stream (``scripts/lognormal.py``: K=3 log-normal components, D=4,
sdlog 0.6-1.0), fed as Parquet drops of 50,000 rows through the real pipeline in a
temporary folder with the shipped defaults. Prints tables; asserts nothing.
Usage: ``python -m scripts.bench_transforms [--stationary-rows N]``.
"""
from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np

from scripts.lognormal import FEATURES, Stream, log_rows, truth
from shoal.daemon.runtime.logs import setup_logging

LOG = {"transforms": {f: "log" for f in FEATURES}}
WARMUP = 2000


def ari(truth_labels, segments) -> float:
    from sklearn.metrics import adjusted_rand_score   # a reference, where installed

    scored = ~np.isnan(segments)
    return adjusted_rand_score(truth_labels[scored], segments[scored])


def timed(folder: Path, X, drop_rows=50_000, **overrides):
    s = Stream(folder, **overrides)
    t0 = time.perf_counter()
    segments = s.feed(X, drop_rows)
    seconds = time.perf_counter() - t0
    alerts = s.alerts()
    state = s.pipeline.state
    s.close()
    return segments, alerts, seconds, state


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--stationary-rows", type=int, default=2_000_000)
    args = ap.parse_args()
    setup_logging("error")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        print(f"{'recovery, 40,000 rows':24s} {'ARI log':>8s} {'ARI logged':>10s} "
              f"{'ARI raw':>8s} {'log - logged':>12s} {'log - raw':>9s}")
        for seed in (0, 1, 2):
            weights, meanlog, covs = truth(seed)
            labels, Y = log_rows(np.random.default_rng(100 + seed), 40_000, weights,
                                 meanlog, covs)
            a = ari(labels, timed(tmp / f"r{seed}l", np.exp(Y), 10_000, **LOG)[0])
            b = ari(labels, timed(tmp / f"r{seed}y", Y, 10_000)[0])
            c = ari(labels, timed(tmp / f"r{seed}r", np.exp(Y), 10_000)[0])
            print(f"{'truth seed ' + str(seed):24s} {a:8.4f} {b:10.4f} {c:8.4f} "
                  f"{a - b:12.4f} {a - c:9.4f}")

        print()
        n = args.stationary_rows
        weights, meanlog, covs = truth(0)
        _, Y = log_rows(np.random.default_rng(300), n, weights, meanlog, covs)
        print(f"{'stationary stream':28s} {'rows':>10s} {'alerts':>7s} {'segments':>9s} "
              f"{'rows/s':>10s} {'rate / logged':>13s}")
        runs = {}
        for label, X, extra in (("logged rows (anchor)", Y, {}),
                                ("log transforms", None, LOG),
                                ("raw rows, no transforms", None, {})):
            X = np.exp(Y) if X is None else X
            _, alerts, seconds, state = timed(tmp / label.split()[0], X, **extra)
            runs[label] = n / seconds
            raised = sum(a["status"] == "raised" for a in alerts)
            print(f"{label:28s} {n:10d} {raised:7d} {state.mixture.n_components:9d} "
                  f"{n / seconds:10.0f} {runs[label] / runs['logged rows (anchor)']:13.2f}")
            del X

        print()
        window = 4096
        change = WARMUP + 40 * window
        print(f"{'median x2 (at row ' + format(change, ',') + ')':30s} {'weight':>6s} "
              f"{'windows to alert':>16s}  explanation")
        for i, (comp, feature) in enumerate(((0, 0), (1, 2), (2, 1), (2, 3))):
            rng = np.random.default_rng(400 + i)
            _, before = log_rows(rng, change, weights, meanlog, covs)
            _, after = log_rows(rng, 5 * window, weights, meanlog, covs,
                                shift=(comp, feature, np.log(2.0)))
            s = Stream(tmp / f"d{i}", **LOG)
            s.feed(np.exp(before), 50_000)
            s.feed(np.exp(after), window)
            raised = [a for a in s.alerts() if a["status"] == "raised"]
            s.close()
            if raised:
                a = raised[0]
                windows = f"{(a['rows']['last'] + 1 - change) / window:.0f}"
                why = a["explanation"]["summary"]
            else:
                windows, why = "none in 5", "-"
            print(f"{'component ' + str(comp) + ', ' + FEATURES[feature]:30s} "
                  f"{weights[comp]:6.2f} {windows:>16s}  {why}")


if __name__ == "__main__":
    main()
