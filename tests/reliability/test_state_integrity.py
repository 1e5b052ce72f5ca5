"""A state store that was emptied, rolled back or damaged is refused (exit 3) with what to
do, never taken for a fresh store and never loaded into a wrong model."""
import os
import signal
import sqlite3
import subprocess
import sys

import numpy as np
import pytest

from _ops import parquet_drops
from shoal.daemon.state import store as store_module
from shoal.daemon.cli.main import main
from drills import synthetic_table, wait_until, write_config, write_drop
from shoal.daemon.errors import StateError
from shoal.daemon.state.marker import read_marker
from shoal.daemon.state.store import StateStore, npy_array, npy_bytes

SEED = 11


def _drops(folder, first, n):
    return parquet_drops(folder, first, n, SEED)


def _ingest(cfg, paths):
    return main(["ingest", "-c", str(cfg), *map(str, paths)])


def _ledger_rows(db):
    con = sqlite3.connect(db)
    try:
        return con.execute("SELECT COUNT(*) FROM ledger").fetchone()[0]
    finally:
        con.close()


def _watch(cfg, log):
    with open(log, "ab") as err:
        return subprocess.Popen([sys.executable, "-m", "shoal.daemon.cli.main", "watch", "-c",
                                 str(cfg)], stdout=subprocess.DEVNULL, stderr=err,
                                stdin=subprocess.DEVNULL)


def test_an_emptied_store_in_a_used_folder_is_refused_not_started_afresh(tmp_path, capsys):
    cfg = write_config(tmp_path)
    assert _ingest(cfg, _drops(tmp_path, 0, 3)) == 0
    db = tmp_path / "state" / "state.db"
    assert read_marker(db).ledger_rows == 3 and read_marker(db).model_version == 3
    os.truncate(db, 0)
    capsys.readouterr()
    again = _drops(tmp_path, 0, 1)
    assert _ingest(cfg, again) == 3
    err = capsys.readouterr().err
    assert "is empty (0 bytes), but this state folder has been used" in err
    assert "Restore state.db" in err and "Traceback" not in err
    assert db.stat().st_size == 0          # nothing was made in its place
    db.unlink()                            # missing altogether: the same
    assert _ingest(cfg, again) == 3
    assert "is missing, but this state folder has been used" in capsys.readouterr().err
    # a folder made before the marker existed: its outbox and processed/ say it was used
    (tmp_path / "state" / "state.marker").unlink()
    assert main(["segments", "-c", str(cfg)]) == 3
    err = capsys.readouterr().err
    assert "3 labels files in" in err and "Traceback" not in err
    assert not db.exists()


def test_a_wal_deleted_after_a_kill_is_refused_as_a_rolled_back_store(tmp_path):
    cfg = write_config(tmp_path, watch={"settle_seconds": 0.1, "rescan_seconds": 0.2})
    assert _ingest(cfg, _drops(tmp_path, 0, 2)) == 0      # closed cleanly: in state.db
    db = tmp_path / "state" / "state.db"
    log = tmp_path / "watch.log"
    proc = _watch(cfg, log)
    try:
        for i in range(2, 6):
            write_drop(synthetic_table(i, 300, SEED), tmp_path / "inbox", f"w{i}.parquet")
        wait_until(lambda: read_marker(db).ledger_rows >= 6, 60, "four commits by watch")
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=10)
    wal = db.with_name("state.db-wal")
    assert wal.stat().st_size > 0          # the four commits are in the WAL alone
    wal.unlink()
    db.with_name("state.db-shm").unlink(missing_ok=True)
    proc = _watch(cfg, log)
    try:
        assert proc.wait(timeout=60) == 3
    finally:
        if proc.poll() is None:            # it started on the rolled-back store
            proc.kill()
            proc.wait(timeout=10)
    text = log.read_text()
    assert "was rolled back: it holds 2 ledger rows and model version 2, but 6 ledger rows " \
           "and model version 6 had been committed" in text
    assert "state.db-wal deleted" in text and "Traceback" not in text
    assert _ledger_rows(db) == 2           # refused before anything was taken again


def _flip_bit(db, name):
    con = sqlite3.connect(db)
    try:
        version, blob = con.execute("SELECT version, npy FROM checkpoint_arrays WHERE name = ? "
                                    "ORDER BY version DESC LIMIT 1", (name,)).fetchone()
        damaged = bytearray(blob)
        damaged[-3] ^= 0x10                # one bit of the last element's mantissa
        with con:
            con.execute("UPDATE checkpoint_arrays SET npy = ? WHERE version = ? AND name = ?",
                        (bytes(damaged), version, name))
        return npy_array(blob), npy_array(bytes(damaged))
    finally:
        con.close()


def test_a_damaged_checkpoint_is_state_unusable_never_a_model_or_a_traceback(tmp_path, capsys):
    cfg = write_config(tmp_path)
    assert _ingest(cfg, _drops(tmp_path, 0, 3)) == 0
    db = tmp_path / "state" / "state.db"
    before, after = _flip_bit(db, "covariances")
    assert np.sum(before != after) == 1    # one element of one covariance changed
    capsys.readouterr()
    for argv in (["ingest", "-c", str(cfg), str(_drops(tmp_path, 3, 1)[0])],
                 ["status", "-c", str(cfg)], ["segments", "-c", str(cfg)]):
        assert main(argv) == 3, argv
        err = capsys.readouterr().err
        assert "array 'covariances' fails its checksum" in err, err
        assert "Traceback" not in err
    _flip_bit(db, "covariances")           # put the bit back
    assert main(["segments", "-c", str(cfg)]) == 0
    con = sqlite3.connect(db)
    with con:                              # the checkpoint's JSON damaged instead
        con.execute("UPDATE checkpoints SET meta = substr(meta, 2) WHERE version = "
                    "(SELECT MAX(version) FROM checkpoints)")
    con.close()
    capsys.readouterr()
    assert main(["ingest", "-c", str(cfg), str(_drops(tmp_path, 4, 1)[0])]) == 3
    err = capsys.readouterr().err
    assert "meta or extra data fails its checksum" in err and "Traceback" not in err


def _as_version_2(db):
    """Undo what schema versions 3-5 changed (the alert words, the checkpoint checksums,
    the attempts table), as a version-2 shoal left the store."""
    con = sqlite3.connect(db)
    with con:
        con.execute("ALTER TABLE checkpoints DROP COLUMN checksum")
        con.execute("ALTER TABLE checkpoint_arrays DROP COLUMN checksum")
        con.execute("UPDATE meta SET value = '2' WHERE key = 'schema_version'")
        con.execute("DELETE FROM meta WHERE key IN ('store_id', 'model_contract')")
    con.close()
    db.with_suffix(".marker").unlink()


def test_a_version_2_store_migrates_and_its_checkpoints_get_checksums(tmp_path, capsys):
    cfg = write_config(tmp_path)
    assert _ingest(cfg, _drops(tmp_path, 0, 3)) == 0
    db = tmp_path / "state" / "state.db"
    _as_version_2(db)
    store = StateStore(db)
    try:
        assert store._meta("schema_version") == str(store_module.SCHEMA_VERSION) == "5"
        cp = store.latest_checkpoint()
        sums = dict(store.db.execute("SELECT name, checksum FROM checkpoint_arrays WHERE "
                                     "version = ?", (cp.version,)))
        assert sums["covariances"] == store_module.checksum(npy_bytes(cp.arrays["covariances"]))
    finally:
        store.close()
    assert read_marker(db).ledger_rows == 3      # the marker made for the older store
    _flip_bit(db, "means")
    store = StateStore(db)
    try:
        with pytest.raises(StateError, match="array 'means' fails its checksum"):
            store.latest_checkpoint()
    finally:
        store.close()


def test_a_torn_marker_record_skips_the_check_once_and_is_rewritten(tmp_path):
    from shoal.daemon.state.store import LedgerEntry

    db = tmp_path / "state.db"
    store = StateStore(db)
    store.commit_input(LedgerEntry("d1", "a.csv", 1, "committed"), learned=True)
    store.close()
    marker = db.with_suffix(".marker")
    text = marker.read_text()
    torn = text.replace("ledger_rows 00000000000000000001", "ledger_rows 00000000000000000091")
    marker.write_text(torn)                 # a digit from another write: its check fails
    assert read_marker(db).ledger_rows is None and read_marker(db).store_id is not None
    store = StateStore(db)                  # not refused as rolled back (91 > 1)
    try:
        store.commit_input(LedgerEntry("d2", "b.csv", 1, "committed"), learned=True)
    finally:
        store.close()
    assert (read_marker(db).ledger_rows, read_marker(db).model_version) == (2, 2)
