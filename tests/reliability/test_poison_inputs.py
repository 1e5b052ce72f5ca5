"""Inputs that once killed the service: each is read correctly or quarantined with a
reason, and a running ``shoal watch`` goes on to the good file behind them.

Also: an input that kills the process outright (a crash no handler catches) is
quarantined at a later start, once ``limits.max_attempts`` processes died on it; and
``shoal ingest`` says in one line per input what became of it, never a traceback.
"""
import gzip
import json
import os
import subprocess
import sys
from pathlib import Path

import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from shoal.daemon.cli.main import main
from drills import (
    MTIME_BASE,
    ServiceProcess,
    ledger_counts,
    synthetic_table,
    wait_until,
    write_config,
)

SEED = 13
NON_UTF8 = b"sensor-\xff\xfe.csv"


def _csv(table: pa.Table) -> bytes:
    sink = pa.BufferOutputStream()
    pacsv.write_csv(table, sink)
    return sink.getvalue().to_pybytes()


def _parquet(table: pa.Table) -> bytes:
    sink = pa.BufferOutputStream()
    pq.write_table(table, sink)
    return sink.getvalue().to_pybytes()


def _corrupt_gzip() -> bytes:
    data = bytearray(gzip.compress(_csv(synthetic_table(5, 400, SEED)), mtime=0))
    for i in range(12, 40):            # the deflate data just past the 10-byte header
        data[i] ^= 0xA5
    return bytes(data)


def poison_drops() -> list[tuple[bytes, bytes, str]]:
    """(file name, content, what must become of it), oldest first."""
    stamped = synthetic_table(6, 300, SEED)
    stamped = stamped.set_column(1, "ts", pa.array(
        (stamped.column("ts").to_numpy() * 10**9).astype("datetime64[ns]")))
    return [
        (b"seed.parquet", _parquet(synthetic_table(0, 700, SEED)), "committed"),
        (b"cr-only.csv", _csv(synthetic_table(1, 200, SEED)).replace(b"\n", b"\r"),
         "committed"),
        (b"cr-in-header.csv", b"key,ts,f1\r,f2,f3\nk,1,1.0,2.0,3.0\n", "missing_column"),
        (b"wide-header.csv", b"key,ts,f1,f2,f3," + b"x" * (200 << 10) + b"\nk,1,1,2,3,4\n",
         "bad_header"),
        (b"corrupt.csv.gz", _corrupt_gzip(), "bad_compression"),
        (NON_UTF8, _csv(synthetic_table(2, 200, SEED)), "committed"),
        (b"ts-as-text.csv", _csv(synthetic_table(3, 200, SEED).set_column(
            1, "ts", pa.array([f"t{i}" for i in range(200)]))), "committed"),
        (b"ts-as-timestamp.parquet", _parquet(stamped), "committed"),
        (b"ts-as-integer.parquet", _parquet(synthetic_table(7, 200, SEED)), "committed"),
        (b"good.csv", _csv(synthetic_table(4, 300, SEED)), "committed"),
    ]


def _drop(inbox: Path, name: bytes, data: bytes, index: int) -> None:
    staging = os.fsencode(inbox.parent / "staging")
    os.makedirs(staging, exist_ok=True)
    os.makedirs(inbox, exist_ok=True)
    tmp = os.path.join(staging, name)
    with open(tmp, "wb") as f:
        f.write(data)
    os.utime(tmp, ns=((MTIME_BASE + index) * 10**9,) * 2)
    os.rename(tmp, os.path.join(os.fsencode(inbox), name))


def test_poison_inputs_are_read_or_quarantined_and_watch_goes_on(tmp_path):
    # ts as text in the labels, so that inputs whose ts changes kind are all taken
    cfg = write_config(tmp_path, warmup_rows=600, drift={"time_column": "ts"},
                       passthrough_types={"ts": "string"})
    service = ServiceProcess(cfg, tmp_path / "watch.log").start()
    db = tmp_path / "state" / "state.db"
    drops = poison_drops()
    try:
        service.wait_event("service_started", 60)
        for i, (name, data, _) in enumerate(drops):
            _drop(tmp_path / "inbox", name, data, i)
        wait_until(lambda: sum(ledger_counts(db).values()) >= len(drops), 60,
                   "every drop in the ledger", interval=0.1)
        assert service.alive()
        status = subprocess.run([sys.executable, "-m", "shoal.daemon.cli.main", "status", "-c",
                                 str(cfg)], capture_output=True, text=True, timeout=60)
    finally:
        code, _ = service.stop(timeout=30)
    assert code == 0
    from shoal.daemon.state.store import StateStore

    store = StateStore(db)
    try:
        ledger = [(e.name, e.outcome, (e.reason or "").split(":")[0]) for e in store.ledger()]
    finally:
        store.close()
    want = [(name.decode("utf-8", "backslashreplace"),
             "committed" if what == "committed" else "quarantined",
             "" if what == "committed" else what) for name, _, what in drops]
    assert ledger == want
    # the CR-only CSV was read whole; the labels of the non-UTF-8 name say its name safely
    labels = {pq.read_schema(p).metadata[b"shoal.input_name"].decode(): pq.read_table(p)
              for p in (tmp_path / "outbox").iterdir()}
    assert labels["cr-only.csv"].num_rows == 200
    assert labels["sensor-\\xff\\xfe.csv"].num_rows == 200
    assert os.path.exists(os.path.join(os.fsencode(tmp_path / "state" / "processed"), NON_UTF8))
    events = service.events()
    assert not [e for e in events if e.get("event") == "worker_failed"]
    # text that is no time ("t0"...) is counted, not compared with the others
    assert [e["rows"] for e in events if e.get("event") == "time_unreadable"] == [200]
    for name in (b"corrupt.csv.gz", b"wide-header.csv"):
        side = json.loads((tmp_path / "state" / "quarantine" / (name.decode() + ".json")).read_text())
        assert side["reason"] and side["detail"]
    assert status.returncode == 0, status.stderr
    assert "last error: corrupt.csv.gz: bad_compression" in status.stdout


# An input that ends the process with no chance to catch anything (as a crash in a
# compiled library would): os._exit once reading it begins.
_CRASHING = """
import os, sys
from shoal.daemon.ingest import stages
real = stages.iter_frames
def frames(f, *args, **kw):
    if os.readlink(f"/proc/self/fd/{f.fileno()}").endswith("crash.csv"):
        os._exit(9)
    return real(f, *args, **kw)
stages.iter_frames = frames
from shoal.daemon.cli.main import main
sys.exit(main(sys.argv[1:]))
"""


def test_an_input_that_kills_the_process_is_quarantined_at_a_later_start(tmp_path):
    cfg = write_config(tmp_path, warmup_rows=600, limits={"max_attempts": 2})
    log = tmp_path / "watch.log"
    drops = [(b"first.csv", _csv(synthetic_table(0, 700, SEED))),
             (b"crash.csv", _csv(synthetic_table(1, 200, SEED))),
             (b"after.csv", _csv(synthetic_table(2, 200, SEED)))]
    for i, (name, data) in enumerate(drops):
        _drop(tmp_path / "inbox", name, data, i)
    codes = []
    for _ in range(3):   # dies, dies, then quarantines it unread and goes on
        with open(log, "ab") as err:
            proc = subprocess.Popen([sys.executable, "-c", _CRASHING, "watch", "-c", str(cfg)],
                                    stdout=subprocess.DEVNULL, stderr=err)
        service = ServiceProcess(cfg, log)
        service.proc = proc
        try:
            wait_until(lambda: proc.poll() is not None or
                       ledger_counts(tmp_path / "state" / "state.db").get("committed", 0) >= 2,
                       60, "the service to die or commit", interval=0.1)
            codes.append(proc.poll())
        finally:
            if service.alive():
                codes[-1] = service.stop(timeout=30)[0]
    assert codes == [9, 9, 0]
    from shoal.daemon.state.store import StateStore

    store = StateStore(tmp_path / "state" / "state.db")
    try:
        ledger = [(e.name, e.outcome) for e in store.ledger()]
        reason = store.ledger("quarantined")[0].reason
        left = store.db.execute("SELECT COUNT(*) FROM attempts").fetchone()[0]
    finally:
        store.close()
    assert ledger == [("first.csv", "committed"), ("crash.csv", "quarantined"),
                      ("after.csv", "committed")]
    assert reason.startswith("internal_error: the process ended 2 times") and left == 0
    assert (tmp_path / "state" / "quarantine" / "crash.csv").exists()


def test_ingest_says_in_one_line_what_became_of_each_input(tmp_path, capsys):
    cfg = write_config(tmp_path, warmup_rows=600, drift={"time_column": "ts"},
                       passthrough_types={"ts": "string"})
    files = tmp_path / "files"
    files.mkdir()
    paths = []
    for i, (name, data, _) in enumerate(poison_drops()):
        path = os.path.join(os.fsencode(files), name)
        with open(path, "wb") as f:
            f.write(data)
        paths.append(os.fsdecode(path))
    code = main(["ingest", "-c", str(cfg), *paths])
    out, err = capsys.readouterr()
    lines = out.splitlines()
    assert code == 1
    assert len(lines) == len(paths) + 1
    for line, (name, _, what) in zip(lines, poison_drops()):
        shown = name.decode("utf-8", "backslashreplace")
        assert line.split()[:2] == ["committed" if what == "committed" else "quarantined",
                                    shown], line
        assert what == "committed" or f"({what}: " in line
    assert "Traceback" not in out and "Traceback" not in err
