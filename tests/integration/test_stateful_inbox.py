"""A stateful test of the inbox: hypothesis picks a sequence of drops - new
files renamed into the inbox, files written in place half-way then finished,
duplicates under a new name, corrupt files - and
crashes at chosen moments of an input (before its labels file, after it, after the
commit, before the move out of the inbox), each followed by a restart from the state
folder. Inputs the service's readiness gate passes (on a clock the test moves) are
taken oldest first by ``Pipeline.process``, as the service does.

After every step: each committed input has exactly one labels file; no input is both
committed and quarantined; the model version equals the committed inputs in the
ledger; nothing is left in the inbox. At the end the final model equals, bit for bit,
a run that never crashed over the same inputs in the same order.

A crash here is an exception that no handler catches, raised at the chosen point,
and the restart a new store and pipeline on the same folders; ``scripts/crashtest``
does the same with SIGKILL on a real process.
"""
import os
import shutil
import time

import numpy as np
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
from hypothesis import HealthCheck, settings
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, invariant, precondition, rule

import shoal.daemon.ingest.commit as commit_module
from shoal.daemon.files.writer import LabelsFile
from drills import MTIME_BASE, synthetic_table, write_config

DEEP = os.environ.get("SHOAL_DEEP") == "1"
SEED = 17
CRASH_POINTS = ["before_labels", "after_labels", "after_commit", "before_move"]


class Crash(BaseException):
    """Stands for SIGKILL: nothing in the service catches it."""


def _open(folder):
    from shoal.config import load_config
    from shoal.daemon.files.layout import prepare_folders
    from shoal.daemon.ingest.pipeline import Pipeline
    from shoal.daemon.state.store import StateStore

    settings = load_config(folder / "shoal.yaml")
    layout = prepare_folders(settings)
    store = StateStore(layout.db)
    return Pipeline(settings, layout, store), store


class Inbox(RuleBasedStateMachine):
    def __init__(self):
        super().__init__()
        import tempfile
        self.root = __import__("pathlib").Path(tempfile.mkdtemp(prefix="shoal-stateful-"))
        self.folder = self.root / "run"
        write_config(self.folder, warmup_rows=300, segments=2, drift={"enabled": False})
        self.pipeline, self.store = _open(self.folder)
        self.staging = self.root / "staging"
        self.staging.mkdir()
        self.n = 0
        self.data: dict[str, bytes] = {}          # what was dropped under each name
        self.contents: list[bytes] = []
        self.crashes = 0
        # The service's readiness gate, on a clock the test moves (settle time 2 s).
        from shoal.daemon.intake.gate import ReadinessGate
        self.now = 0.0
        self.gate = ReadinessGate(2.0, clock=lambda: self.now)

    # -- making drops ------------------------------------------------------------------
    def _stage(self, data: bytes, name: str):
        self.n += 1
        path = self.staging / name
        path.write_bytes(data)
        self.data[name] = data
        os.utime(path, ns=((MTIME_BASE + self.n) * 10**9,) * 2)
        return path

    def _table_bytes(self, rows: int, parquet: bool) -> bytes:
        tmp = self.staging / "make.tmp"
        table = synthetic_table(self.n, rows, SEED)
        (pq.write_table if parquet else pacsv.write_csv)(table, tmp)
        data = tmp.read_bytes()
        tmp.unlink()
        return data

    def _rename_in(self, path):
        os.rename(path, self.pipeline.layout.inbox / path.name)

    def _take_all(self, crash_at: str | None = None) -> None:
        """Process the inbox oldest first; a crash restarts and takes it again."""
        restore = self._arm(crash_at) if crash_at else None
        try:
            self._drain()
        except Crash:
            self.crashes += 1
            restore()
            restore = None
            self.store.close()
            self.pipeline, self.store = _open(self.folder)
            self._drain()
        finally:
            if restore:
                restore()

    def _drain(self) -> None:
        """Take the ready inputs oldest first, as the service does, until none is ready."""
        from shoal.daemon.intake.gate import Verdict

        inbox = self.pipeline.layout.inbox
        while True:
            paths = sorted(inbox.iterdir(), key=lambda p: (p.stat().st_mtime_ns, p.name))
            ready = [p for p in paths if self.gate.check(p).verdict is Verdict.READY]
            if not ready:
                return
            self.gate.forget(ready[0])
            self.pipeline.process(ready[0])

    def _arm(self, point: str):
        """Make the next input crash at ``point``; return the undo."""
        cm, store = commit_module, self.store
        saved = {"write_labels": LabelsFile.keep, "move_out": cm.move_out,
                 "commit_input": store.commit_input}

        def write_labels(*a, **k):
            if point == "before_labels":
                raise Crash(point)
            out = saved["write_labels"](*a, **k)
            if point == "after_labels":
                raise Crash(point)
            return out

        def commit_input(*a, **k):
            out = saved["commit_input"](*a, **k)
            if point == "after_commit":
                raise Crash(point)
            return out

        def move_out(*a, **k):
            if point == "before_move":
                raise Crash(point)
            return saved["move_out"](*a, **k)

        LabelsFile.keep, cm.move_out, store.commit_input = write_labels, move_out, \
            commit_input

        def restore():
            LabelsFile.keep, cm.move_out = saved["write_labels"], saved["move_out"]
            store.__dict__.pop("commit_input", None)
        return restore

    # -- rules ---------------------------------------------------------------------------
    @rule(rows=st.integers(50, 400), parquet=st.booleans())
    def drop_new(self, rows, parquet):
        data = self._table_bytes(rows, parquet)
        self.contents.append(data)
        self._rename_in(self._stage(data, f"in-{self.n:03d}." + ("parquet" if parquet
                                                                   else "csv")))
        self._take_all()

    @precondition(lambda self: self.contents)
    @rule(pick=st.integers(0, 10**6))
    def drop_duplicate(self, pick):
        data = self.contents[pick % len(self.contents)]
        suffix = "parquet" if data.startswith(b"PAR1") else "csv"
        self._rename_in(self._stage(data, f"dup-{self.n:03d}.{suffix}"))
        self._take_all()

    @rule(kind=st.sampled_from(["missing", "truncated", "text"]))
    def drop_corrupt(self, kind):
        data = {"missing": b"key,ts,f1\nk,1,0.5\n",
                "truncated": self._table_bytes(50, True)[:-20],
                "text": b"key,ts,f1,f2,f3\nk,1,0.5,warm,1\n"}[kind]
        suffix = "parquet" if kind == "truncated" else "csv"
        self._rename_in(self._stage(data, f"bad-{self.n:03d}.{suffix}"))
        self._take_all()

    @rule(rows=st.integers(50, 400), cut=st.floats(0.1, 0.9))
    def drop_half_written_then_finish(self, rows, cut):
        """Written in place (not renamed): not read while incomplete, read once settled."""
        data = self._table_bytes(rows, False)
        self.contents.append(data)
        self.n += 1
        name = f"slow-{self.n:03d}.csv"
        self.data[name] = data
        path = self.pipeline.layout.inbox / name
        path.write_bytes(data[:int(len(data) * cut)])
        self._take_all()
        assert path.exists(), "a half-written file was taken"
        with open(path, "ab") as f:
            f.write(data[int(len(data) * cut):])
        self._take_all()
        assert path.exists(), "a file was taken before it settled"
        self.now += 3.0  # past the settle time: unchanged that long, last written before it
        past = time.time_ns() - 3 * 10**9
        os.utime(path, ns=(past, past))
        self._take_all()

    @rule(rows=st.integers(50, 400), point=st.sampled_from(CRASH_POINTS))
    def drop_then_crash(self, rows, point):
        data = self._table_bytes(rows, False)
        self.contents.append(data)
        self._rename_in(self._stage(data, f"in-{self.n:03d}.csv"))
        self._take_all(crash_at=point)

    # -- invariants ----------------------------------------------------------------------
    def _ledger(self):
        return self.store.db.execute(
            "SELECT name, outcome, labels FROM ledger ORDER BY id").fetchall()

    @invariant()
    def one_labels_file_per_committed_input(self):
        rows = self._ledger()
        taken = [(n, l) for n, o, l in rows if o in ("committed", "duplicate")]
        assert len({n for n, _ in taken}) == len(taken)
        outbox = sorted(p.name for p in self.pipeline.layout.outbox.iterdir())
        assert outbox == sorted(l for _, l in taken)

    @invariant()
    def never_both_committed_and_quarantined(self):
        rows = self._ledger()
        committed = {n for n, o, _ in rows if o in ("committed", "duplicate")}
        assert not committed & {n for n, o, _ in rows if o == "quarantined"}

    @invariant()
    def ledger_and_model_version_agree(self):
        learned = sum(o == "committed" for _, o, _ in self._ledger())
        assert self.store.model_version == learned == self.pipeline.state.version
        assert not any(self.pipeline.layout.inbox.iterdir())

    def teardown(self):
        try:
            if self.crashes and self.pipeline.state.mixture is not None:
                self._compare_with_an_uncrashed_run()
        finally:
            self.store.close()
            shutil.rmtree(self.root, ignore_errors=True)

    def _compare_with_an_uncrashed_run(self):
        ref = self.root / "reference"
        write_config(ref, warmup_rows=300, segments=2, drift={"enabled": False})
        pipeline, store = _open(ref)
        try:
            for (name,) in self.store.db.execute("SELECT name FROM ledger ORDER BY id"):
                path = ref / "inbox" / name
                path.write_bytes(self.data[name])
                pipeline.process(path)
            a = self.store.latest_checkpoint().arrays
            b = store.latest_checkpoint().arrays
            assert store.model_version == self.store.model_version
            assert a.keys() == b.keys()
            for key in a:
                np.testing.assert_array_equal(a[key], b[key])
        finally:
            store.close()


Inbox.TestCase.settings = settings(
    max_examples=400 if DEEP else 6, stateful_step_count=30 if DEEP else 8, deadline=None,
    derandomize=not DEEP, suppress_health_check=[HealthCheck.too_slow])
TestInbox = Inbox.TestCase
