#!/usr/bin/env python3
"""Soak and burst: drop files into a real `shoal watch` and report lag, RSS over time
and any loss. Prints tables; exit 1 if an input was lost or taken twice.

  scripts/soak --rate 50 --duration 600     a sustained rate (files/s) for a time (s)
  scripts/soak --burst 10000                N files renamed into the inbox at once

Every file is written to a staging folder before the service starts, so that while
the clock runs this process only renames (it shares the machine with the service).
Lag is the time from an input's rename into the inbox until its ledger row was
committed (both wall-clock times on this machine). RSS is the service process's
resident set (VmRSS in /proc/PID/status), sampled every --sample seconds.
`scripts/soak` runs it with the project's Python (and sets up .venv on a fresh clone).
"""
import argparse
import os
import sqlite3
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from scripts.tests_support import load

_drills = load("drills")   # the suite's support module, by file
ServiceProcess, synthetic_table = _drills.ServiceProcess, _drills.synthetic_table
wait_until, write_config = _drills.wait_until, _drills.write_config


def memory(pid: int, key: str = "VmRSS") -> int:
    """``VmRSS`` (resident now) or ``VmHWM`` (peak) of a process in bytes, proc(5)."""
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith(key + ":"):
                return int(line.split()[1]) * 1024
    return 0


def ledger(db: Path) -> list[tuple[str, str, float]]:
    """(name, outcome, finished_at) of every ledger row, read-only."""
    if not db.exists():
        return []
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=10.0)
    try:
        return con.execute("SELECT name, outcome, finished_at FROM ledger").fetchall()
    except sqlite3.OperationalError:
        return []
    finally:
        con.close()


def stage(staging: Path, i: int, rows: int, seed: int) -> str:
    name = f"soak-{i:06d}." + ("parquet" if i % 2 else "csv")
    (pq.write_table if i % 2 else pacsv.write_csv)(synthetic_table(i, rows, seed),
                                                   staging / name)
    return name


class Sampler(threading.Thread):
    """Every ``every`` s: elapsed, dropped, committed, backlog, RSS, worst lag of the row."""

    def __init__(self, pid: int, db: Path, dropped: dict, every: float):
        super().__init__(daemon=True)
        self.pid, self.db, self.dropped, self.every = pid, db, dropped, every
        self.rows: list[tuple] = []
        self.stop = threading.Event()
        self.t0 = time.time()

    def sample(self) -> None:
        rows = ledger(self.db)
        done = [(n, t) for n, o, t in rows if o == "committed"]
        recent = [t - self.dropped[n] for n, t in done
                  if n in self.dropped and t >= time.time() - self.every]
        self.rows.append((time.time() - self.t0, len(self.dropped), len(done),
                          len(self.dropped) - len(done), memory(self.pid) / 2**20,
                          max(recent) if recent else float("nan")))

    def run(self) -> None:
        while not self.stop.wait(self.every):
            self.sample()


def table(header: tuple, rows: list[tuple]) -> str:
    cells = [header] + [tuple(f"{v:.2f}" if isinstance(v, float) else str(v) for v in r)
                        for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(header))]
    lines = ["  ".join(c.rjust(w) for c, w in zip(r, widths)) for r in cells]
    return "\n".join([lines[0], "  ".join("-" * w for w in widths), *lines[1:]])


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rate", type=float, default=50.0, help="files per second")
    p.add_argument("--duration", type=float, default=600.0, help="seconds of dropping")
    p.add_argument("--burst", type=int, default=0, help="drop this many files at once instead")
    p.add_argument("--rows", type=int, default=100, help="rows per file")
    p.add_argument("--sample", type=float, default=10.0, help="seconds between samples")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--timeout", type=float, default=3600.0, help="give up draining after")
    p.add_argument("--dir", default=None, help="keep the run here (default: a temp folder)")
    a = p.parse_args()
    with tempfile.TemporaryDirectory(prefix="shoal-soak-") as tmp:
        return run(a, Path(a.dir or tmp))


def run(a, folder: Path) -> int:
    config = write_config(folder, watch={"settle_seconds": 0.5, "rescan_seconds": 5.0})
    for sub in ("inbox", "staging"):
        (folder / sub).mkdir(parents=True, exist_ok=True)
    inbox, staging, db = folder / "inbox", folder / "staging", folder / "state" / "state.db"
    n_total = a.burst or int(a.rate * a.duration)
    t_stage = time.monotonic()
    staged = [stage(staging, i, a.rows, a.seed) for i in range(n_total)]
    print(f"staged {n_total} files in {time.monotonic() - t_stage:.0f} s", flush=True)
    service = ServiceProcess(config, folder / "service.log").start()
    dropped: dict[str, float] = {}
    try:
        service.wait_event("service_started", 60)
        sampler = Sampler(service.proc.pid, db, dropped, a.sample)
        sampler.start()
        t0 = time.monotonic()
        for i, name in enumerate(staged):
            if not a.burst:
                time.sleep(max(0.0, t0 + i / a.rate - time.monotonic()))
            os.rename(staging / name, inbox / name)
            dropped[name] = time.time()
        dropping = time.monotonic() - t0
        wait_until(lambda: sum(o == "committed" for _, o, _ in ledger(db)) >= len(dropped),
                   a.timeout, f"{len(dropped)} committed inputs", interval=0.5)
        drained = time.monotonic() - t0
        sampler.stop.set()
        sampler.join(timeout=30)
        sampler.sample()
        peak_rss = memory(service.proc.pid, "VmHWM")
        code, _ = service.stop()
    finally:
        service.kill()
    rows = ledger(db)
    names = [n for n, o, _ in rows if o == "committed"]
    lags = np.array([t - dropped[n] for n, o, t in rows if o == "committed" and n in dropped])
    lost = sorted(set(dropped) - set(names))
    twice = len(names) - len(set(names))
    other = [(n, o) for n, o, _ in rows if o != "committed"]
    print(table(("t s", "dropped", "committed", "backlog", "RSS MiB", "max lag s"),
                sampler.rows))
    rss = [r[4] for r in sampler.rows]
    summary = [
        ("mode", f"burst of {a.burst}" if a.burst else f"{a.rate:g} files/s for {a.duration:g} s"),
        ("rows per file", a.rows),
        ("files dropped", len(dropped)),
        ("committed", len(names)),
        ("lost (dropped, never committed)", len(lost)),
        ("committed twice", twice),
        ("other ledger outcomes", len(other)),
        ("dropping took s", round(dropping, 1)),
        ("drop rate achieved files/s", round(len(dropped) / dropping, 1) if dropping else "-"),
        ("all committed after s", round(drained, 1)),
        ("throughput files/s", round(len(names) / drained, 1)),
        ("lag p50 / p95 / max s", "%.2f / %.2f / %.2f" % (np.percentile(lags, 50),
                                                         np.percentile(lags, 95), lags.max())
         if len(lags) else "-"),
        ("RSS first / last sample MiB", f"{rss[0]:.0f} / {rss[-1]:.0f}" if rss else "-"),
        ("RSS peak (VmHWM) MiB", round(peak_rss / 2**20)),
        ("service exit code", code),
    ]
    print()
    print(table(("", "value"), summary))
    return 1 if lost or twice or other else 0


if __name__ == "__main__":
    sys.exit(main())
