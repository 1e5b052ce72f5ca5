#!/usr/bin/env python3
"""Latency bench: time from a 1,000-row drop being renamed into the inbox until its
labels file exists, over 100 drops, against a running `shoal watch` process.

`bench_latency(...)` returns the figures; run as a script it prints a table.
"""
from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def bench_latency(drops: int = 100, rows: int = 1000, seed: int = 0,
                  workdir: Path | None = None, fmt: str = "parquet") -> dict:
    """Seconds per drop (p50, p95, max) from rename into the inbox to labels file present."""
    from shoal.daemon.files.digest import digest_file
    from scripts.tests_support import load

    drills = load("drills")   # the suite's support module, by file
    ServiceProcess, synthetic_table = drills.ServiceProcess, drills.synthetic_table
    wait_until, write_config, write_drop = drills.wait_until, drills.write_config, drills.write_drop
    from shoal.daemon.state.readout import StateReader
    from shoal.daemon.files.writer import labels_name

    with tempfile.TemporaryDirectory(prefix="shoal-bench-") as tmp:
        folder = Path(workdir or tmp)
        cfg = write_config(folder, warmup_rows=rows)
        svc = ServiceProcess(cfg, folder / "watch.log").start()
        latencies = []
        try:
            svc.wait_event("service_started", timeout=60)
            reader = StateReader(folder / "state" / "state.db")
            algorithm = reader.digest_algorithm   # the labels files are named by it
            reader.close()
            # warm-up drop: the first model is fitted here, not timed
            tables = [synthetic_table(i, rows, seed) for i in range(drops + 1)]
            staging = folder / "staging"
            staging.mkdir(exist_ok=True)
            for i, table in enumerate(tables):
                name = f"bench-{i:04d}.{fmt}"
                staged = write_drop(table, staging, name)   # written, not yet in the inbox
                with open(staged, "rb") as f:
                    digest = digest_file(f, algorithm)
                target = folder / "outbox" / labels_name(name, digest, "parquet")
                t0 = time.perf_counter()
                staged.rename(folder / "inbox" / name)
                wait_until(target.exists, 60, f"labels of {name}", interval=0.0005)
                if i > 0:
                    latencies.append(time.perf_counter() - t0)
            svc.stop()
        finally:
            svc.kill()
    a = np.array(latencies)
    return {"drops": len(a), "rows": rows, "p50_ms": 1000 * float(np.percentile(a, 50)),
            "p95_ms": 1000 * float(np.percentile(a, 95)), "max_ms": 1000 * float(a.max())}


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--drops", type=int, default=100)
    p.add_argument("--rows", type=int, default=1000)
    p.add_argument("--format", choices=("parquet", "csv"), default="parquet")
    a = p.parse_args()
    r = bench_latency(a.drops, a.rows, fmt=a.format)
    print(f"{'bench':<52} {'p50 ms':>8} {'p95 ms':>8} {'max ms':>8}")
    label = f"drop-to-labels latency ({r['rows']} rows, {r['drops']} drops, {a.format})"
    print(f"{label:<52} {r['p50_ms']:8.1f} {r['p95_ms']:8.1f} {r['max_ms']:8.1f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
