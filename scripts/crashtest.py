#!/usr/bin/env python3
"""Crash test: SIGKILL `shoal watch` at random moments while drops arrive (renamed in,
written in place or copied slowly; some while it starts again), restart it, and compare
everything with `shoal ingest` of the same files oldest first. Prints a table; exit 1 on
a mismatch.

usage: scripts/crashtest [--drops 200] [--kills 20] [--rows 300] [--seed 0] [--dir DIR]
"""
import argparse
import sys
import tempfile
from pathlib import Path

from scripts.tests_support import load

crash_drill = load("drills").crash_drill   # the suite's support module, by file


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--drops", type=int, default=200)
    p.add_argument("--kills", type=int, default=20)
    p.add_argument("--rows", type=int, default=300)
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--dir", default=None, help="keep the run here (default: a temp folder)")
    a = p.parse_args()
    with tempfile.TemporaryDirectory(prefix="shoal-crash-") as tmp:
        r = crash_drill(Path(a.dir or tmp), drops=a.drops, kills=a.kills, rows=a.rows,
                        seed=a.seed)
    rows = [("drops", a.drops), ("of them written in place", r.in_place),
            ("of them copied slowly in place", r.slow_copies),
            ("SIGKILLs", r.kills), ("ledger: committed inputs", r.committed),
            ("labels files", r.labels_files),
            ("labels identical to the uncrashed run", r.labels_identical),
            ("model version (crashed / reference)", f"{r.model_version} / {r.reference_version}"),
            ("final model arrays bit-identical", "yes" if r.model_identical else "NO"),
            ("ledger identical in order (digest, name, size, rows, outcome, reason, "
             "labels, model version)", "yes" if r.ledger_identical else
             f"NO: {r.ledger_difference}"),
            ("seconds", r.seconds), ("result", "PASS" if r.ok else "FAIL")]
    width = max(len(k) for k, _ in rows)
    for k, v in rows:
        print(f"{k:<{width}}  {v}")
    return 0 if r.ok else 1


if __name__ == "__main__":
    sys.exit(main())
