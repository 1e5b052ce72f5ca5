"""Burst: 1,000 small files renamed into a watched
inbox at once are all committed, none twice, none missed. The 10,000-file form is
``scripts/soak --burst 10000``."""
import os
import sqlite3

import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from drills import MTIME_BASE, InProcessService, synthetic_table

SEED = 11
N_FILES = 1000
ROWS = 20


def test_a_burst_of_1000_files_is_taken_exactly_once(tmp_path):
    # The queue holds fewer events than the burst makes, so the rescan must find the rest.
    with InProcessService(tmp_path, timeout=300, warmup_rows=300,
                          watch={"settle_seconds": 0.5, "rescan_seconds": 2.0,
                                 "queue_size": 100}) as svc:
        staging = tmp_path / "staging"
        staging.mkdir()
        names = []
        for i in range(N_FILES):
            name = f"burst-{i:04d}." + ("parquet" if i % 2 else "csv")
            write = pq.write_table if i % 2 else pacsv.write_csv
            write(synthetic_table(i, ROWS, SEED), staging / name)
            os.utime(staging / name, ns=((MTIME_BASE + i) * 10**9,) * 2)
            names.append(name)
        for name in names:  # all at once
            os.rename(staging / name, svc.layout.inbox / name)
        svc.wait_results(N_FILES)
        results = list(svc.results)
        version = svc.reader.model_version

    assert len(results) == N_FILES
    assert sorted(r.name for r in results) == names            # none missed, none twice
    assert {r.outcome for r in results} == {"committed"}
    assert [r.name for r in results] == names                  # oldest first
    con = sqlite3.connect(tmp_path / "state" / "state.db")
    try:
        ledger = con.execute("SELECT name, outcome, rows FROM ledger ORDER BY id").fetchall()
    finally:
        con.close()
    assert ledger == [(n, "committed", ROWS) for n in names]
    assert version == N_FILES                                  # one model version per input
    labels = sorted(p.name for p in (tmp_path / "outbox").iterdir())
    assert len(labels) == N_FILES and len({n.split(".")[0] for n in labels}) == N_FILES
    assert sorted(p.name for p in (tmp_path / "state" / "processed").iterdir()) == names
    assert not any((tmp_path / "inbox").iterdir())
