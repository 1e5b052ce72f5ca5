"""Fault injection: writes of the labels file and of the state store fail with ENOSPC,
EIO or EACCES at chosen points while a watched service runs, and inputs cannot be opened
for a while (EMFILE, EACCES).

For each point: the service stays up, logs the failure and commits nothing of that
input; the state store stays readable (model version and ledger as before); no temp
file is left in the outbox. Once the fault is gone the input is retried and committed
once, before anything newer, and the final model, ledger and labels equal ``shoal
ingest`` of the same files oldest first.
"""
import errno
import os
import sqlite3
from pathlib import Path

import numpy as np
import pytest

from drills import (
    InProcessService,
    ingest_in_order,
    ledger_rows,
    synthetic_table,
    wait_until,
    write_config,
    write_drop,
)

SEED = 21
NAMES = ["first.parquet", "second.csv", "third.parquet"]
ROWS = [700, 300, 300]


class Fault:
    """Armed, it makes the chosen call fail; ``hits`` counts the failures it caused."""

    def __init__(self):
        self.armed = False
        self.hits = 0

    def fire(self, error: Exception) -> None:
        self.hits += 1
        raise error


def _fd_path(fd: int) -> str:
    return os.readlink(f"/proc/self/fd/{fd}")


class FailingConnection:
    """A sqlite3 connection whose chosen statement fails (before or after running)."""

    def __init__(self, real, fault: Fault, sql: str, after: bool):
        self._real, self._fault, self._sql, self._after = real, fault, sql, after

    def execute(self, sql, *args):
        if sql.startswith("BEGIN"):
            self._ledger = False
        elif sql.startswith("INSERT INTO ledger"):
            self._ledger = True
        # a COMMIT fails only where it commits an input (not an attempt's record)
        if self._fault.armed and sql.startswith(self._sql) and \
                (self._sql != "COMMIT" or getattr(self, "_ledger", False)):
            if self._after:
                self._real.execute(sql, *args)
                self._fault.fire(sqlite3.OperationalError("disk I/O error"))
            self._fault.fire(sqlite3.OperationalError("database or disk is full"))
        return self._real.execute(sql, *args)

    def __getattr__(self, name):
        return getattr(self._real, name)


def _inject(point: str, fault: Fault, svc, monkeypatch) -> None:
    outbox = str(svc.layout.outbox)
    if point.startswith("fsync"):
        real = os.fsync
        want = {"fsync_labels": lambda p: p.endswith(".tmp") and p.startswith(outbox),
                "fsync_outbox": lambda p: p == outbox}[point]

        def fsync(fd):
            if fault.armed and want(_fd_path(fd)):
                fault.fire(OSError(errno.EIO, os.strerror(errno.EIO)))
            return real(fd)

        monkeypatch.setattr(os, "fsync", fsync)
    elif point == "replace_labels":
        real_replace = os.replace

        def replace(src, dst, **kw):
            if fault.armed and str(dst).startswith(outbox):
                fault.fire(OSError(errno.ENOSPC, os.strerror(errno.ENOSPC)))
            return real_replace(src, dst, **kw)

        monkeypatch.setattr(os, "replace", replace)
    else:
        sql, after = {"sqlite_insert": ("INSERT INTO ledger", False),
                      "sqlite_commit": ("COMMIT", False),
                      "sqlite_commit_lost_reply": ("COMMIT", True)}[point]
        svc.store.db = FailingConnection(svc.store.db, fault, sql, after)


def _snapshot(folder: Path):
    """Ledger (drills.LEDGER_FIELDS in order), model version, final model arrays, labels
    bytes of a run."""
    from shoal.daemon.state.store import StateStore

    ledger = ledger_rows(folder / "state" / "state.db")
    store = StateStore(folder / "state" / "state.db")
    try:
        cp = store.latest_checkpoint()
        version = store.model_version
    finally:
        store.close()
    labels = {p.name: p.read_bytes() for p in (folder / "outbox").iterdir()}
    return ledger, version, cp.arrays, labels


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """``shoal ingest`` of the drops, oldest first, in a state folder of its own."""
    folder = tmp_path_factory.mktemp("reference")
    cfg = write_config(folder, warmup_rows=600)
    (folder / "files").mkdir()
    files = [write_drop(synthetic_table(i, ROWS[i], SEED), folder / "files", name, i)
             for i, name in enumerate(NAMES)]
    ingest_in_order(cfg, files, timeout=120)
    return _snapshot(folder)


def _same_as(reference, folder: Path) -> None:
    ledger, version, arrays, labels = _snapshot(folder)
    ref_ledger, ref_version, ref_arrays, ref_labels = reference
    assert ledger == ref_ledger and version == ref_version == 3   # none lost, none twice
    assert arrays.keys() == ref_arrays.keys()
    for key in arrays:
        np.testing.assert_array_equal(arrays[key], ref_arrays[key])
    assert labels == ref_labels


POINTS = ["fsync_labels", "fsync_outbox", "replace_labels", "sqlite_insert", "sqlite_commit",
          "sqlite_commit_lost_reply"]


@pytest.mark.parametrize("point", POINTS)
def test_a_failed_write_commits_nothing_and_is_retried(tmp_path, monkeypatch, reference, point):
    import shoal.daemon.intake.service as service_module

    monkeypatch.setattr(service_module, "_RETRY_FIRST", 0.2)
    fault = Fault()
    with InProcessService(tmp_path, timeout=60, warmup_rows=600) as svc:
        assert svc.drop(synthetic_table(0, ROWS[0], SEED), NAMES[0]).outcome == "committed"
        _inject(point, fault, svc, monkeypatch)
        fault.armed = True
        write_drop(synthetic_table(1, ROWS[1], SEED), svc.layout.inbox, NAMES[1])
        svc.n += 1
        # A COMMIT that reached the disk but reported an error is not tried twice: its
        # retry finds the input done. Every other fault fails each try while armed.
        tries = 1 if point == "sqlite_commit_lost_reply" else 2
        wait_until(lambda: svc.service.counts.get("failed", 0) >= tries, 30, "failed tries")
        # While failing: the state is readable and holds only the first input.
        if point != "sqlite_commit_lost_reply":  # that COMMIT did reach the disk
            assert svc.reader.model_version == 1
            assert [e.name for e in svc.reader.find_done(_digest(svc, NAMES[1]))] == []
            assert (svc.layout.inbox / NAMES[1]).exists()
        assert not [p for p in svc.layout.outbox.iterdir() if p.name.endswith(".tmp")]
        assert len(svc.results) == 1
        fault.armed = False
        r = svc.wait_results(2)
        assert r.name == NAMES[1]
        expected = "already_done" if point == "sqlite_commit_lost_reply" else "committed"
        assert (r.name, r.outcome) == (NAMES[1], expected)
        r = svc.drop(synthetic_table(2, ROWS[2], SEED), NAMES[2])
        assert (r.name, r.outcome) == (NAMES[2], "committed")
        counts = dict(svc.service.counts)
    assert fault.hits >= tries and counts["failed"] == fault.hits
    _same_as(reference, tmp_path)


def _fail_opening(fault: Fault, folder: str, error: int, monkeypatch) -> None:
    """``os.open`` of a file in ``folder`` fails with ``error`` while ``fault`` is armed."""
    real = os.open

    def failing_open(path, *args, **kw):
        if fault.armed and os.fspath(path).startswith(folder):
            fault.fire(OSError(error, os.strerror(error), os.fspath(path)))
        return real(path, *args, **kw)

    monkeypatch.setattr(os, "open", failing_open)


@pytest.mark.parametrize("fault_kind", ["full_disk", "unwritable_outbox", "input_emfile",
                                        "input_eacces"])
def test_after_a_fault_clears_the_failed_input_goes_before_newer_ones(
        tmp_path, monkeypatch, reference, fault_kind):
    import shoal.daemon.intake.service as service_module

    monkeypatch.setattr(service_module, "_RETRY_FIRST", 1.0)
    fault = Fault()
    with InProcessService(tmp_path, timeout=60, warmup_rows=600) as svc:
        assert svc.drop(synthetic_table(0, ROWS[0], SEED), NAMES[0]).outcome == "committed"
        if fault_kind == "full_disk":
            _inject("replace_labels", fault, svc, monkeypatch)
        else:
            folder, error = {"unwritable_outbox": (svc.layout.outbox, errno.EACCES),
                             "input_emfile": (svc.layout.inbox, errno.EMFILE),
                             "input_eacces": (svc.layout.inbox, errno.EACCES)}[fault_kind]
            _fail_opening(fault, str(folder), error, monkeypatch)
        fault.armed = True
        write_drop(synthetic_table(1, ROWS[1], SEED), svc.layout.inbox, NAMES[1])
        wait_until(lambda: svc.service.counts.get("failed", 0) >= 1, 30, "a failed try")
        assert len(svc.results) == 1 and svc.reader.model_version == 1
        fault.armed = False   # cleared: a newer drop arrives before the retry is due
        write_drop(synthetic_table(2, ROWS[2], SEED), svc.layout.inbox, NAMES[2])
        done = [svc.wait_results(2), svc.wait_results(3)]
        assert [(r.name, r.outcome) for r in done] == [(NAMES[1], "committed"),
                                                       (NAMES[2], "committed")]
    _same_as(reference, tmp_path)


def _digest(svc, name: str) -> str:
    """The input's ledger digest: a new store's is BLAKE3 (computed by the blake3 package)."""
    import blake3
    return blake3.blake3((svc.layout.inbox / name).read_bytes()).hexdigest()
