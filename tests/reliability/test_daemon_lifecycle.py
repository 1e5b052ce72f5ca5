"""Real `shoal watch` processes: SIGTERM mid-file, SIGKILL at random
moments (short form of scripts/crashtest), 50 demo drops."""
import json
import sqlite3
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from drills import (
    ServiceProcess,
    crash_drill,
    ledger_counts,
    wait_until,
    write_config,
    write_drop,
)


def test_sigterm_during_a_two_million_row_file(tmp_path):
    cfg = write_config(tmp_path, passthrough=[], log_level="debug", warmup_rows=2000)
    rng = np.random.default_rng(21)  # seeded synthetic rows, three groups
    n = 2_000_000
    X = rng.normal(size=(n, 3)) + np.array([[0, 0, 0], [6, 0, 1], [0, 6, -1]])[rng.integers(0, 3, n)]
    table = pa.table({"f1": X[:, 0], "f2": X[:, 1], "f3": X[:, 2]})
    del X
    db = tmp_path / "state" / "state.db"
    svc = ServiceProcess(cfg, tmp_path / "run1.log").start()
    try:
        svc.wait_event("service_started", timeout=60)
        write_drop(table, tmp_path / "inbox", "big.parquet")
        svc.wait_event("input_started", timeout=30)
        code, seconds = svc.stop(timeout=15)
    finally:
        svc.kill()
    assert code == 0 and seconds < 5.0, (code, seconds)
    assert ledger_counts(db).get("committed", 0) == 0
    assert list((tmp_path / "outbox").iterdir()) == []          # nothing partial
    assert (tmp_path / "inbox" / "big.parquet").exists()        # left for the restart
    svc = ServiceProcess(cfg, tmp_path / "run2.log").start()
    try:
        wait_until(lambda: ledger_counts(db).get("committed", 0) == 1, 120, "big file committed")
        svc.stop(timeout=15)
    finally:
        svc.kill()
    (labels,) = (tmp_path / "outbox").iterdir()
    assert pq.read_metadata(labels).num_rows == n


def test_sigkill_at_random_moments_short_crash_drill(tmp_path):
    report = crash_drill(tmp_path, drops=40, kills=6, rows=300, seed=3, timeout=120)
    assert report.kills == 6
    assert report.committed == 40 and report.labels_files == 40
    assert report.labels_identical == 40                       # byte for byte
    assert report.model_identical and report.model_version == report.reference_version == 40
    assert report.slow_copies > 0 and report.in_place > 0
    assert report.ledger_identical, report.ledger_difference


def test_fifty_demo_drops_csv_and_parquet(tmp_path):
    from shoal.daemon.demo.scenario import FEATURES, drops

    cfg = write_config(tmp_path, features=list(FEATURES), passthrough=["unit_id", "timestamp"],
                       segments=4, warmup_rows=2000, learning={"n_init": 2})
    db = tmp_path / "state" / "state.db"
    svc = ServiceProcess(cfg, tmp_path / "watch.log").start()
    expected = {}
    try:
        svc.wait_event("service_started", timeout=60)
        for i, columns in enumerate(drops(50, 400, seed=7)):
            columns.pop("state")
            name = f"fleet-{i:03d}." + ("parquet" if i % 2 else "csv")
            write_drop(pa.table(columns), tmp_path / "inbox", name, index=i)
            expected[name] = len(columns["unit_id"])
        wait_until(lambda: ledger_counts(db).get("committed", 0) >= 50, 120, "50 commits",
                   interval=0.1)
        code, _ = svc.stop(timeout=15)
    finally:
        svc.kill()
    assert code == 0
    assert ledger_counts(db) == {"committed": 50}
    con = sqlite3.connect(db)
    rows = dict(con.execute("SELECT name, rows FROM ledger"))
    labels = dict(con.execute("SELECT name, labels FROM ledger"))
    con.close()
    assert rows == expected
    outs = sorted(p.name for p in (tmp_path / "outbox").iterdir())
    assert outs == sorted(labels.values()) and len(outs) == 50
    for name, n in expected.items():
        t = pq.read_table(tmp_path / "outbox" / labels[name])
        assert t.num_rows == n
        assert t.column_names == ["unit_id", "timestamp", "segment", "confidence",
                                  "log_density", "unusual", "model_version", "observed"]
    last = pq.read_table(tmp_path / "outbox" / labels["fleet-049.parquet"])
    assert last.column("segment").null_count == 0
    assert set(last.column("segment").to_pylist()) <= {0, 1, 2, 3}
    events = [e["event"] for e in svc.events()]
    assert events.count("input_committed") == 50 and "model_initialised" in events
