"""Benchmark of ``shoal backfill``: a history of Parquet files learned on local
Dask workers against the same files taken by one process (the service's pipeline, as
``shoal ingest`` runs it). Prints a table; asserts nothing.

    ./scripts/bench --backfill          10,000,000 rows in 100 files, 2 workers
    python scripts/bench_backfill.py --rows 1000000 --files 20
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import yaml

__all__ = ["backfill_table"]

N_COMPONENTS = 6
N_FEATURES = 8


def write_history(folder: Path, n_rows: int, n_files: int, seed: int = 8) -> list[Path]:
    """``n_files`` Parquet files drawn from one seeded full-covariance mixture (synthetic)."""
    rng = np.random.default_rng(seed)
    weights = rng.dirichlet(np.full(N_COMPONENTS, 5.0))
    means = rng.normal(0.0, 4.0, (N_COMPONENTS, N_FEATURES))
    A = rng.normal(0.0, 0.3, (N_COMPONENTS, N_FEATURES, N_FEATURES))
    chol = np.linalg.cholesky(A @ np.swapaxes(A, 1, 2) + 0.5 * np.eye(N_FEATURES))
    folder.mkdir(parents=True, exist_ok=True)
    paths, start = [], 0
    for i in range(n_files):
        n = n_rows // n_files + (1 if i < n_rows % n_files else 0)
        r = np.random.default_rng([seed, i])
        labels = r.choice(N_COMPONENTS, size=n, p=weights)
        X = means[labels] + np.einsum("nde,ne->nd", chol[labels],
                                      r.normal(size=(n, N_FEATURES)))
        cols = {"id": pa.array(np.arange(start, start + n, dtype=np.int64))}
        cols.update({f"f{j}": X[:, j] for j in range(N_FEATURES)})
        path = folder / f"part-{i:04d}.parquet"
        pq.write_table(pa.table(cols), path)
        paths.append(path)
        start += n
    return paths


def write_bench_config(folder: Path) -> Path:
    cfg = {"features": [f"f{j}" for j in range(N_FEATURES)], "passthrough": ["id"],
           "segments": N_COMPONENTS, "warmup_rows": 20000, "log_level": "warning",
           "learning": {"n_init": 2},
           "drift": {"enabled": False},           # the same maths on both sides:
           "lifecycle": {"enabled": False},       # backfill keeps the segments it starts with
           "output": {"keep_inputs": True}}
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "shoal.yaml"
    path.write_text(yaml.safe_dump(cfg))
    return path


def single_process(config: Path, paths: list[Path]) -> float:
    """Seconds for one process to take every file through the service's pipeline."""
    from shoal.config import load_config
    from shoal.daemon.files.layout import prepare_folders
    from shoal.daemon.ingest.pipeline import Pipeline
    from shoal.daemon.state.store import StateStore

    settings = load_config(config)
    layout = prepare_folders(settings)
    store = StateStore(layout.db)
    try:
        pipeline = Pipeline(settings, layout, store)
        t = time.perf_counter()
        for p in paths:
            result = pipeline.process(p, in_inbox=False)
            assert result.outcome == "committed", result
        return time.perf_counter() - t
    finally:
        store.close()


def backfill_table(n_rows: int = 10_000_000, n_files: int = 100, workers: int = 2,
                   round_rows: int | None = None, workdir: Path | None = None) -> dict:
    """Print the backfill row: single-process rate, backfill rate, speed-up, overhead."""
    from distributed import Client, LocalCluster

    from shoal.config import load_config
    from shoal.daemon.backfill.learn import DEFAULT_ROUND_ROWS, backfill

    round_rows = round_rows or DEFAULT_ROUND_ROWS
    with tempfile.TemporaryDirectory(dir=workdir) as tmp:
        tmp = Path(tmp)
        t = time.perf_counter()
        paths = write_history(tmp / "history", n_rows, n_files)
        t_write = time.perf_counter() - t
        t_single = single_process(write_bench_config(tmp / "single"), paths)
        settings = load_config(write_bench_config(tmp / "cluster"))
        t = time.perf_counter()
        with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                          dashboard_address=None) as cluster, \
                Client(cluster, set_as_default=False) as client:
            client.wait_for_workers(workers, timeout=120)
            t_start = time.perf_counter() - t
            t = time.perf_counter()
            report = backfill(settings, [tmp / "history"], client=client,
                              round_rows=round_rows)
            t_backfill = time.perf_counter() - t
    single_rate, cluster_rate = n_rows / t_single, n_rows / t_backfill
    overhead = workers * t_backfill / t_single
    print(f"\nBackfill: {n_rows:,} rows in {n_files} Parquet files, K={N_COMPONENTS}, "
          f"D={N_FEATURES}, full; rounds of {report.round_rows:,} rows ({report.rounds} "
          f"rounds); {os.cpu_count()} cores on this machine")
    print(f"{'run':<34} {'seconds':>8} {'rows/s':>12}")
    print(f"{'one process (pipeline, as ingest)':<34} {t_single:>8.1f} {single_rate:>12,.0f}")
    print(f"{f'backfill, {workers} local workers':<34} {t_backfill:>8.1f} {cluster_rate:>12,.0f}")
    print(f"speed-up {cluster_rate / single_rate:.2f}x; overhead ratio (worker-seconds per "
          f"row over one process's) {overhead:.2f}; cluster start {t_start:.1f} s and "
          f"writing the files {t_write:.1f} s not counted")
    return {"single_seconds": t_single, "backfill_seconds": t_backfill,
            "single_rate": single_rate, "backfill_rate": cluster_rate, "overhead": overhead}


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--rows", type=int, default=10_000_000)
    parser.add_argument("--files", type=int, default=100)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--round-rows", type=int, default=None)
    args = parser.parse_args(argv)
    backfill_table(args.rows, args.files, args.workers, args.round_rows)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
