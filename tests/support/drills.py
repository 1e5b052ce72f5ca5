"""Operational drills: drive a real ``shoal watch`` process from outside.

A support module of the test suite, loaded by ``scripts/crashtest`` (SIGKILL at random
moments, then compare with a run that never crashed), ``scripts/soak``,
``scripts/bench_latency.py`` (by file, through ``scripts/tests_support.py``) and the
service tests (on pytest's path).
Every wait here has a timeout.
"""
from __future__ import annotations

import json
import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import yaml

from shoal.daemon.demo.drops import MTIME_BASE, write_drop

__all__ = ["synthetic_table", "write_drop", "write_config", "ServiceProcess", "ledger_counts",
           "wait_until", "crash_drill", "DrillReport", "MTIME_BASE", "InProcessService",
           "LEDGER_FIELDS", "ledger_rows", "ledger_difference", "final_arrays", "same_arrays",
           "ingest_in_order", "slow_copy", "deliver"]


def synthetic_table(index: int, rows: int, seed: int) -> pa.Table:
    """A seeded drop of invented data: key, ts and three features from three groups."""
    rng = np.random.default_rng([seed, index])
    centres = np.array([[0.0, 0.0, 0.0], [6.0, 0.0, 1.0], [0.0, 6.0, -1.0]])
    group = rng.choice(3, size=rows, p=[0.5, 0.3, 0.2])
    X = centres[group] + rng.normal(size=(rows, 3))
    return pa.table({
        "key": [f"d{index:04d}-{j:05d}" for j in range(rows)],
        "ts": pa.array(np.arange(rows, dtype=np.int64) + index * rows),
        "f1": X[:, 0], "f2": X[:, 1], "f3": X[:, 2],
    })


def write_config(folder: Path, **overrides) -> Path:
    """A config for the synthetic drops in ``folder`` (inbox/, outbox/, state/)."""
    cfg = {"features": ["f1", "f2", "f3"], "passthrough": ["key", "ts"], "segments": 3,
           "warmup_rows": 600, "watch": {"settle_seconds": 0.5, "rescan_seconds": 1.0},
           "learning": {"n_init": 2}}
    for key, value in overrides.items():
        if isinstance(value, dict) and isinstance(cfg.get(key), dict):
            cfg[key] = {**cfg[key], **value}
        else:
            cfg[key] = value
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "shoal.yaml"
    path.write_text(yaml.safe_dump(cfg))
    return path


def wait_until(predicate: Callable[[], bool], timeout: float, what: str,
               interval: float = 0.02) -> float:
    """Poll ``predicate`` until true; return seconds waited; TimeoutError after ``timeout``."""
    t0 = time.monotonic()
    while not predicate():
        if time.monotonic() - t0 > timeout:
            raise TimeoutError(f"timed out after {timeout} s waiting for {what}")
        time.sleep(interval)
    return time.monotonic() - t0


def ledger_counts(db: Path) -> dict[str, int]:
    """Ledger rows per outcome, read without disturbing a running service."""
    if not db.exists():
        return {}
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=10.0)
    try:
        return dict(con.execute("SELECT outcome, COUNT(*) FROM ledger GROUP BY outcome"))
    except sqlite3.OperationalError:
        return {}
    finally:
        con.close()


class ServiceProcess:
    """``python -m shoal.daemon.cli.main watch -c CONFIG`` with its log in a file."""

    def __init__(self, config: Path, log: Path, python: str = sys.executable):
        self.config, self.log, self.python = Path(config), Path(log), python
        self.proc: subprocess.Popen | None = None

    def start(self) -> "ServiceProcess":
        with open(self.log, "ab") as err:
            self.proc = subprocess.Popen(
                [self.python, "-m", "shoal.daemon.cli.main", "watch", "-c", str(self.config)],
                stdout=subprocess.DEVNULL, stderr=err, stdin=subprocess.DEVNULL)
        return self

    def events(self) -> list[dict]:
        out = []
        if self.log.exists():
            for line in self.log.read_text("utf-8", "replace").splitlines():
                if line.startswith("{"):
                    try:
                        out.append(json.loads(line))
                    except json.JSONDecodeError:
                        pass  # a line cut by SIGKILL
        return out

    def wait_event(self, event: str, timeout: float, count: int = 1) -> None:
        wait_until(lambda: sum(e.get("event") == event for e in self.events()) >= count,
                   timeout, f"{count} '{event}' log events in {self.log}")

    def alive(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def kill(self) -> None:
        if self.alive():
            self.proc.send_signal(signal.SIGKILL)
        if self.proc is not None:
            self.proc.wait(timeout=10)

    def stop(self, timeout: float = 10.0) -> tuple[int, float]:
        """SIGTERM; return (exit code, seconds until exit)."""
        t0 = time.monotonic()
        if self.alive():
            self.proc.send_signal(signal.SIGTERM)
        try:
            code = self.proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout=10)
            raise
        return code, time.monotonic() - t0


class InProcessService:
    """A Service on a worker thread in this process (tests): drop, then wait for results."""

    def __init__(self, folder: Path, observer_factory=None, timeout: float = 30.0,
                 **overrides):
        from shoal.config import load_config
        from shoal.daemon.files.layout import prepare_folders
        from shoal.daemon.ingest.pipeline import Pipeline
        from shoal.daemon.intake.service import Service
        from shoal.daemon.state.store import StateStore

        self.timeout = timeout
        self.settings = load_config(write_config(folder, **overrides))
        self.layout = prepare_folders(self.settings)
        self.store = StateStore(self.layout.db)
        self.pipeline = Pipeline(self.settings, self.layout, self.store)
        self.results = []
        self.service = Service(self.settings, self.layout, self.pipeline,
                               on_result=self.results.append,
                               observer_factory=observer_factory)
        self.thread = threading.Thread(target=self.service.run, name="worker")
        self.reader = StateStore(self.layout.db)  # the test's own connection
        self.n = 0

    def __enter__(self):
        self.thread.start()
        return self

    def __exit__(self, *exc):
        self.service.request_stop()
        self.thread.join(self.timeout)
        if self.thread.is_alive():
            raise TimeoutError("the service did not stop")
        self.store.close()
        self.reader.close()

    def wait_results(self, n):
        wait_until(lambda: len(self.results) >= n, self.timeout, f"{n} results")
        return self.results[n - 1]

    def drop(self, table, name):
        self.n += 1
        write_drop(table, self.layout.inbox, name)
        return self.wait_results(self.n)

    def drop_bytes(self, data: bytes, name):
        staging = self.layout.inbox.parent / "staging"
        staging.mkdir(exist_ok=True)
        (staging / name).write_bytes(data)
        os.rename(staging / name, self.layout.inbox / name)
        self.n += 1
        return self.wait_results(self.n)

    def sidecar(self, name):
        return json.loads((self.layout.quarantine / f"{name}.json").read_text())


@dataclass
class DrillReport:
    drops: int
    kills: int
    slow_copies: int
    in_place: int
    committed: int
    labels_files: int
    labels_identical: int
    model_identical: bool
    model_version: int
    reference_version: int
    ledger_identical: bool
    ledger_difference: str
    seconds: float

    @property
    def ok(self) -> bool:
        return (self.committed == self.drops and self.labels_files == self.drops
                and self.labels_identical == self.drops and self.model_identical
                and self.model_version == self.reference_version and self.ledger_identical)


# The ledger's fields compared between runs: all but times (and attempt counts, which
# live outside the ledger).
LEDGER_FIELDS = ("digest", "name", "size", "rows", "outcome", "reason", "labels",
                 "model_version")


def ledger_rows(db: Path) -> list[tuple]:
    """The ledger in order, ``LEDGER_FIELDS`` of each row."""
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=10.0)
    try:
        return con.execute(f"SELECT {', '.join(LEDGER_FIELDS)} FROM ledger "
                           "ORDER BY id").fetchall()
    finally:
        con.close()


def ledger_difference(rows: list[tuple], reference: list[tuple]) -> str:
    """'' if equal, else where the first difference is."""
    for i, (a, b) in enumerate(zip(rows, reference)):
        if a != b:
            return f"row {i + 1}: {a} against {b}"
    if len(rows) != len(reference):
        return f"{len(rows)} rows against {len(reference)}"
    return ""


def final_arrays(db: Path) -> tuple[int, dict[str, np.ndarray]]:
    """The store's model version and its latest checkpoint's arrays."""
    from shoal.daemon.state.store import StateStore

    store = StateStore(db)
    try:
        cp = store.latest_checkpoint()
        return store.model_version, ({} if cp is None else cp.arrays)
    finally:
        store.close()


def same_arrays(a: dict[str, np.ndarray], b: dict[str, np.ndarray]) -> bool:
    """Bit for bit: the same names, dtypes, shapes and bytes."""
    return bool(a) and a.keys() == b.keys() and all(
        a[k].dtype == b[k].dtype and a[k].shape == b[k].shape and a[k].tobytes() == b[k].tobytes()
        for k in a)


def ingest_in_order(config: Path, files: list[Path], python: str = sys.executable,
                    timeout: float = 300.0) -> None:
    """``shoal ingest`` of ``files`` in the defined order: oldest first (modification time,
    then name), the order ``shoal watch`` takes them in."""
    ordered = sorted(files, key=lambda p: (os.stat(p).st_mtime_ns, p.name))
    subprocess.run([python, "-m", "shoal.daemon.cli.main", "ingest", "-c", str(config),
                    *map(str, ordered)], check=True, stdout=subprocess.DEVNULL,
                   stderr=subprocess.DEVNULL, timeout=timeout)


def slow_copy(data: bytes, target: Path, pieces: int, pause: float) -> None:
    """Write ``data`` into ``target`` in place, in ``pieces`` with ``pause`` seconds
    between them (a producer copying slowly, with shorter pauses than the settle time)."""
    cut = np.linspace(0, len(data), pieces + 1).astype(int)
    with open(target, "wb") as f:
        for i in range(pieces):
            f.write(data[cut[i]:cut[i + 1]])
            f.flush()
            if i + 1 < pieces:
                time.sleep(pause)


def deliver(data: bytes, inbox: Path, name: str, how: str, pause: float = 0.0) -> int:
    """Put a drop into ``inbox`` the way a producer would: ``rename`` (written beside the
    inbox, renamed in: complete at once), ``in_place`` (written straight into the inbox:
    complete once settled) or ``slow`` (in place, in three pieces ``pause`` apart).
    Returns its modification time (ns), taken before the service can move it."""
    if how == "rename":
        staging = inbox.parent / (inbox.name + ".staging")
        staging.mkdir(exist_ok=True)
        (staging / name).write_bytes(data)
        mtime = os.stat(staging / name).st_mtime_ns
        os.rename(staging / name, inbox / name)
        return mtime
    if how == "slow":
        slow_copy(data, inbox / name, pieces=3, pause=pause)
    else:
        (inbox / name).write_bytes(data)
    return os.stat(inbox / name).st_mtime_ns   # settling: not taken for a while yet


def _drop_bytes(table: pa.Table, name: str) -> bytes:
    sink = pa.BufferOutputStream()
    if name.endswith(".parquet"):
        pq.write_table(table, sink)
    else:
        pacsv.write_csv(table, sink)
    return sink.getvalue().to_pybytes()


def crash_drill(workdir: Path, drops: int = 200, kills: int = 20, rows: int = 300,
                seed: int = 0, python: str = sys.executable, timeout: float = 300.0,
                slow_share: float = 0.15) -> DrillReport:
    """Feed ``drops`` inputs to a service killed with SIGKILL ``kills`` times; compare.

    Drops arrive renamed in, written in place, or copied slowly in place (a
    ``slow_share`` of them each: :func:`deliver`); the drops after a kill arrive while
    the service starts again. Their modification times are real ones, in the order they
    arrive. The reference is
    ``shoal ingest`` of the same files in the defined order (:func:`ingest_in_order`)
    in a state folder of its own: the final model must be the same bit for bit, every
    labels file the same byte for byte, and the ledgers the same in order on
    ``LEDGER_FIELDS``.
    """
    t0 = time.monotonic()
    rng = np.random.default_rng(seed)
    names = [f"drop-{i:04d}." + ("parquet" if i % 3 == 0 else "csv") for i in range(drops)]
    ref, run = workdir / "reference", workdir / "crashed"
    # The drill kills on purpose, maybe several times in a row while one input is
    # processed: those are not the input's fault, so they never reach its attempts bound.
    limits = {"max_attempts": kills + 2}
    ref_cfg, run_cfg = write_config(ref, limits=limits), write_config(run, limits=limits)
    for folder in (ref / "inbox", run / "inbox", ref / "files"):
        folder.mkdir(parents=True, exist_ok=True)
    data = [_drop_bytes(synthetic_table(i, rows, seed), n) for i, n in enumerate(names)]
    kill_after = set(rng.choice(np.arange(1, drops), size=min(kills, drops - 1),
                                replace=False).tolist())
    how = rng.choice(["rename", "in_place", "slow"], size=drops,
                     p=[1 - 2 * slow_share, slow_share, slow_share])
    settle = 0.5   # write_config's watch.settle_seconds
    service = ServiceProcess(run_cfg, run / "service.log", python).start()
    db = run / "state" / "state.db"
    n_kills = 0
    mtimes = []
    try:
        starts = 1
        for i, name in enumerate(names):
            mtimes.append(deliver(data[i], run / "inbox", name, str(how[i]),
                                  pause=float(rng.uniform(0.1, 0.6)) * settle))
            time.sleep(float(rng.uniform(0.0, 0.03)))
            if i in kill_after:
                # Kill a running service (not one still starting) a random moment after
                # a drop, so that kills land while inputs are being read, learned,
                # written or committed; the next drops arrive while it starts again.
                service.wait_event("service_started", timeout, count=starts)
                time.sleep(float(rng.uniform(0.0, 0.06)))
                service.kill()
                n_kills += 1
                service.start()
                starts += 1
        wait_until(lambda: ledger_counts(db).get("committed", 0) >= drops, timeout,
                   f"{drops} committed inputs in {db}", interval=0.1)
        service.stop()
    finally:
        service.kill()
    files = []
    for name, blob, mtime in zip(names, data, mtimes):   # the same bytes and times
        files.append(ref / "files" / name)
        files[-1].write_bytes(blob)
        os.utime(files[-1], ns=(mtime, mtime))
    ingest_in_order(ref_cfg, files, python, timeout)
    committed = ledger_counts(db).get("committed", 0)
    outs = sorted(p.name for p in (run / "outbox").iterdir())
    ref_outs = sorted(p.name for p in (ref / "outbox").iterdir())
    same = sum((run / "outbox" / n).read_bytes() == (ref / "outbox" / n).read_bytes()
               for n in set(outs) & set(ref_outs))
    version, arrays = final_arrays(db)
    ref_version, ref_arrays = final_arrays(ref / "state" / "state.db")
    difference = ledger_difference(ledger_rows(db), ledger_rows(ref / "state" / "state.db"))
    return DrillReport(drops=drops, kills=n_kills, slow_copies=int(np.sum(how == "slow")),
                       in_place=int(np.sum(how == "in_place")), committed=committed,
                       labels_files=len(outs), labels_identical=same,
                       model_identical=same_arrays(arrays, ref_arrays), model_version=version,
                       reference_version=ref_version, ledger_identical=not difference,
                       ledger_difference=difference, seconds=round(time.monotonic() - t0, 1))
