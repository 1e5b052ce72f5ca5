"""Drift alerts with the default bounds: detection delay per kind and size of change,
false alarms on a stationary stream, and the cost of watching drift (rows per second).

Seeded synthetic mixture (K=6, D=5, the tests' generator), fed as Parquet drops of
10,000 rows through the real pipeline in a temporary folder. Prints tables; asserts
nothing. Usage: ``python scripts/bench_drift.py [--stationary-rows N]``.
"""
from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from shoal.config import parse_config
from shoal.daemon.files.layout import prepare_folders
from shoal.daemon.runtime.logs import setup_logging
from shoal.daemon.segments import monitor  # noqa: F401  (scipy.stats loaded before any timing)
from shoal.daemon.ingest.pipeline import Pipeline
from shoal.daemon.state.store import StateStore

K, D = 6, 5
FEATURES = [f"x{j}" for j in range(D)]
CHANGE_ROW, AFTER, DROP = 60_000, 60_000, 10_000


def truth(seed=3):
    rng = np.random.default_rng(seed)
    weights = rng.dirichlet(np.full(K, 5.0))
    means = rng.normal(0.0, 4.0, (K, D))
    A = rng.normal(0.0, 0.3, (K, D, D))
    return weights, means, A @ np.swapaxes(A, 1, 2) + np.eye(D) * 0.5


def rows(rng, n, weights, means, covs, shift=None, spread=None):
    labels = rng.choice(K, size=n, p=weights / weights.sum())
    chol = np.linalg.cholesky(covs)
    X = means[labels] + np.einsum("nde,ne->nd", chol[labels], rng.standard_normal((n, D)))
    if shift is not None:
        X[labels == shift[0], shift[1]] += shift[2]
    if spread is not None:
        on = labels == spread[0]
        X[on] = means[spread[0]] + spread[1] * (X[on] - means[spread[0]])
    return X


def run(folder: Path, parts, **overrides):
    settings = parse_config({"features": FEATURES, "segments": K, **overrides}, folder)
    layout = prepare_folders(settings)
    store = StateStore(layout.db)
    pipeline = Pipeline(settings, layout, store)
    n, t0 = 0, time.perf_counter()
    for X in parts:
        for start in range(0, len(X), DROP):
            part = X[start:start + DROP]
            path = folder / f"d{n:05d}.parquet"
            pq.write_table(pa.table({f: part[:, j] for j, f in enumerate(FEATURES)}), path)
            pipeline.process(path, in_inbox=False)
            path.unlink()
            n += 1
    seconds = time.perf_counter() - t0
    alerts = [a["payload"] for a in store.alerts()]
    store.close()
    return alerts, seconds


def first(alerts, statistic):
    hits = [a for a in alerts if a["status"] == "raised" and a["statistic"] == statistic]
    return hits[0] if hits else None


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--stationary-rows", type=int, default=1_000_000)
    args = ap.parse_args()
    setup_logging("error")
    weights, means, covs = truth()
    sd = np.sqrt(np.diagonal(covs, axis1=1, axis2=2))
    moved_w = weights.copy()
    cases = [("mean shift 0.5 sd, segment 13%", "mean_shift", dict(shift=(2, 3, 0.5 * sd[2, 3]))),
             ("mean shift 1 sd, segment 13%", "mean_shift", dict(shift=(2, 3, 1.0 * sd[2, 3]))),
             ("mean shift 1 sd, segment 5%", "mean_shift", dict(shift=(3, 0, 1.0 * sd[3, 0]))),
             ("mean shift 2 sd, segment 13%", "mean_shift", dict(shift=(2, 3, 2.0 * sd[2, 3]))),
             ("spread x1.5, segment 19%", "spread_ratio", dict(spread=(1, 1.5))),
             ("spread x2, segment 19%", "spread_ratio", dict(spread=(1, 2.0)))]
    print(f"{'change (at row 60,000)':34s} {'statistic':14s} {'alert after rows':>16s} "
          f"{'value':>8s} {'bound':>6s}")
    with tempfile.TemporaryDirectory() as tmp:
        for i, (name, stat, change) in enumerate(cases):
            rng = np.random.default_rng(100 + i)
            alerts, _ = run(Path(tmp) / f"c{i}",
                            [rows(rng, CHANGE_ROW, weights, means, covs),
                             rows(rng, AFTER, weights, means, covs, **change)])
            a = first(alerts, stat)
            delay = "none" if a is None else str(a["rows"]["last"] + 1 - CHANGE_ROW)
            print(f"{name:34s} {stat:14s} {delay:>16s} "
                  f"{(a or {}).get('value', float('nan')):8.3f} "
                  f"{(a or {}).get('bound', float('nan')):6.2f}")
        for i, dw in enumerate((0.05, 0.10, 0.15)):
            moved_w = weights.copy()
            moved_w[0] -= dw
            moved_w[2] += dw
            rng = np.random.default_rng(200 + i)
            alerts, _ = run(Path(tmp) / f"w{i}", [rows(rng, CHANGE_ROW, weights, means, covs),
                                                 rows(rng, AFTER, moved_w, means, covs)])
            a = first(alerts, "weight_change")
            delay = "none" if a is None else str(a["rows"]["last"] + 1 - CHANGE_ROW)
            print(f"{'weight change ' + str(dw):34s} {'weight_change':14s} {delay:>16s} "
                  f"{(a or {}).get('value', float('nan')):8.3f} "
                  f"{(a or {}).get('bound', float('nan')):6.2f}")

        print()
        print(f"{'stationary stream':34s} {'rows':>10s} {'alerts':>7s} {'rows/s':>10s}")
        for label, extra in (("drift watching on", {}), ("drift watching off",
                                                         {"drift": {"enabled": False}})):
            rng = np.random.default_rng(300)
            X = rows(rng, args.stationary_rows, weights, means, covs)
            alerts, seconds = run(Path(tmp) / label.replace(" ", "-"), [X], **extra)
            print(f"{label:34s} {len(X):10d} {len(alerts):7d} {len(X) / seconds:10.0f}")


if __name__ == "__main__":
    main()
