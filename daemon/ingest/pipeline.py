"""One input, start to finish, in a straight line: claim, read, learn, write, commit.

:class:`Pipeline` owns the model. ``process`` takes one file through the design's
data flow and returns what happened: the input is opened and pinned, its content
claimed against the ledger (:mod:`.claim`), its frames pulled through the stages
(:mod:`.stages`: read -> check -> score -> learn -> label) by this thread into the
labels writer, which writes under a temporary name; once the claim is decided and
the input found unchanged, the labels file is named and the model, the ledger row
and the segment history are committed in one transaction (:mod:`.commit`); the
input is moved to ``processed/`` only after that. A stop request abandons the input
uncommitted (it is redone on restart, identically).

An input streams through in frames of 65,536 rows (whatever record batches the file
holds), so memory does not grow with its size. For inputs of 8 MiB and more, the
content hash, the reading and the encoding of the labels run in helper threads
beside the model's work (bounded queues), which never waits for the hash: an input
the ledger turns out to have already is taken again as a duplicate (or found done)
with nothing of the first attempt kept.

:meth:`Pipeline.process_group` takes several inputs in order as one group: each is
learned from the state the one before it left and its labels file written as usual,
but their commits are made together in ONE transaction at the end (each with its own
ledger row and model version; a crash loses the whole group or nothing).
"""
from __future__ import annotations

import functools
import logging
import os
import sqlite3
import threading
import time
from dataclasses import replace
from pathlib import Path
from typing import TYPE_CHECKING, BinaryIO, Callable, Iterable

import numpy as np

from shoal.config import Settings
from shoal.core import kernel_check
from shoal.daemon.errors import (
    InputChanged,
    InputRefused,
    InputRejected,
    InputVanished,
    Interrupted,
    ServiceError,
)
from shoal.daemon.files.gaps import Unusual
from shoal.daemon.files.labels_schema import Conformer, schema_from_text, schema_text
from shoal.daemon.files.layout import Layout
from shoal.daemon.files.readers import file_digest, prefetch
from shoal.daemon.files.writer import LabelsFile, labels_name
from shoal.daemon.ingest.attempts import Attempts, attempt_runs
from shoal.daemon.ingest.claim import (
    ALREADY_DONE,
    NEW,
    Claim,
    check_unchanged,
    input_name,
    open_input,
)
from shoal.daemon.ingest.commit import (
    Group,
    MoveOut,
    Pending,
    commit_one,
    move_to_processed,
    rebaseline_committed,
)
from shoal.daemon.ingest.endings import labels_metadata, note_skipped, quarantine_input
from shoal.daemon.ingest.label_only import label_with_model
from shoal.daemon.ingest.learned import learned_commit, learned_model
from shoal.daemon.ingest.learning import observed_floor
from shoal.daemon.ingest.results import ModelState, Result, load_model_state, log_result
from shoal.daemon.ingest.rows import RowCount, keep_rows
from shoal.daemon.ingest.stages import (
    InputLearning,
    TimeColumn,
    read_frames,
    scored_tables,
    stop_checked,
    until_claimed,
)
from shoal.daemon.intake.gate import input_kind
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.segments.segment_names import segment_names, with_segment_names
from shoal.daemon.state.store import InputCommit, LedgerEntry, StateStore, WarmupInput

if TYPE_CHECKING:
    from shoal.daemon.segments.monitor import DriftMonitor
    from shoal.daemon.segments.segment_life import LifeWatch

__all__ = ["Pipeline", "Result", "ModelState", "THREADED_BYTES"]

# Inputs from this size on are hashed, read and written by helper threads beside the
# model's; smaller ones in the worker's thread alone (starting a thread can take a few
# ms: a switch interval of the interpreter lock).
THREADED_BYTES = 8 << 20


class Pipeline:
    """The ingest of inputs into one state store by the thread that calls it, which owns
    the model: :meth:`process` (one input), :meth:`process_group` (several, committed
    together), :meth:`label_only` (labels with the current model, nothing committed)
    and :meth:`rebaseline_now`. ``state`` is the model as committed so far; listeners
    hear of committed alerts (``alert_listeners``) and reloaded settings
    (``settings_listeners``)."""

    def __init__(self, settings: Settings, layout: Layout, store: StateStore, *,
                 stop: threading.Event | None = None, wall=time.time,
                 monotonic=time.monotonic):
        self.settings = settings
        self.layout = layout
        self.store = store
        self.stop = stop or threading.Event()
        self.wall = wall
        self.monotonic = monotonic
        # called with the model version after each commit that queued alerts (wakes the sender)
        self.alert_listeners: list = []
        # called with new settings after a reload (SIGHUP) takes effect
        self.settings_listeners: list = []
        self.state = self.load_state()
        self._group: Group | None = None   # the open group (process_group)
        self._attempts = Attempts(store)
        self._clock = TimeColumn()        # the epoch unit last said inferred
        self._conformer: Conformer | None = None   # the input in progress's
        self._skipped: list[int] = []   # lines of CSV rows skipped (input.bad_rows: skip)
        self.rows_skipped = 0           # since start, for the metrics
        self._monitor: DriftMonitor | None = None
        # the compiled scoring kernels checked once (milliseconds) at start-up rather
        # than failing inside the first input
        kernel_check.warm()
        if settings.drift.enabled or settings.lifecycle.enabled:
            # loaded now (with scipy.special and scipy.linalg, ~0.2-0.6 s) rather than
            # inside the first input's processing time
            import shoal.daemon.segments.monitor  # noqa: F401
            import shoal.daemon.segments.segment_life  # noqa: F401

    @property
    def monitor(self) -> DriftMonitor:
        """Drift evaluation with the settings in force (they may be reloaded); kept while
        they are, with what it worked out of the committed baseline."""
        from shoal.daemon.segments.monitor import DriftMonitor

        if self._monitor is None or self._monitor.settings is not self.settings:
            self._monitor = DriftMonitor(self.settings)
        return self._monitor

    def load_state(self) -> ModelState:
        """The model state and the stream's labels schema as the store holds them."""
        text = self.store.labels_schema()
        self._labels_schema = None if text is None else schema_from_text(text)
        return load_model_state(self.settings, self.store)

    def _input_name(self, path: Path) -> str:
        return input_name(self.settings, self.layout.inbox, path)

    def _check_stop(self) -> None:
        if self.stop.is_set():
            raise Interrupted("stop requested")

    # -- one input -----------------------------------------------------------------
    def process(self, path: Path, *, in_inbox: bool = True) -> Result:
        """Process one input and commit it (a group of one: :meth:`process_group`)."""
        results = self.process_group([path], in_inbox=in_inbox)
        if not results:
            raise Interrupted("stop requested")
        return results[0]

    def _process_one(self, path: Path, in_inbox: bool) -> Result:
        path = Path(path)
        t0 = self.monotonic()
        seen_at = self.wall()
        name = self._input_name(path)
        log_event("input_started", logging.DEBUG, file=name, model_version=self.state.version)
        try:
            result = self._process(path, name, in_inbox, seen_at)
        except InputVanished as exc:
            log_event("input_vanished", logging.WARNING, file=name, detail=str(exc))
            return Result("vanished", name, detail=str(exc))
        except InputRefused as exc:
            log_event("input_refused", logging.WARNING, file=name, detail=str(exc))
            return Result("refused", name, detail=str(exc))
        except InputChanged as exc:
            log_event("input_changed", logging.WARNING, file=name, detail=str(exc))
            return Result("changed", name, detail=str(exc))
        except InputRejected as exc:
            return self._quarantine(path, name, in_inbox, exc, seen_at, t0)
        duration = self.monotonic() - t0
        if self._group and self._group.pending[-1].result is result:
            self._group.pending[-1].duration = duration  # logged once committed
        else:
            log_result(result, duration)
        return result

    # -- groups --------------------------------------------------------------------
    def process_group(self, paths: Iterable[Path], *, in_inbox: bool = True) -> list[Result]:
        """Process ``paths`` in order as one group, committed in one transaction at the end.

        Returns a result per input taken. A quarantine (its own transaction) or an
        input found already done first commits the inputs before it, so the ledger
        keeps the order inputs were taken in. A stop request ends the group at the
        input in progress: the inputs before it are committed and their results
        returned (the rest are left for the next run). If a write or the commit
        fails (``OSError``, ``sqlite3.Error``), nothing of the uncommitted inputs
        is kept and the error is raised: ``self.state`` is then ahead of the store
        and the caller reloads it (:meth:`load_state`).

        Each input's attempt is recorded in the store before it is read
        (:meth:`StateStore.attempts`) and cleared by its commit or quarantine. An input
        with an attempt left by an earlier process (which died on it, or on an input
        of its group) is taken on its own, and quarantined unread once
        ``limits.max_attempts`` processes died on it.
        """
        if self._group is not None:
            raise RuntimeError("process_group called inside a group")
        self._group = Group()
        results: list[Result] = []
        recorded: list[str] = []      # attempts recorded by this call
        finished: set[str | None] = set()
        attempts = self._attempts
        try:
            for run, suspect in attempt_runs([Path(p) for p in paths], self.store,
                                             attempts.recorded):
                self._check_stop()
                if suspect:
                    self._flush()   # the inputs before it are not lost with it
                    key, = run.values()
                    tried = self.store.attempts([key])[key]
                    if tried >= self.settings.limits.max_attempts:
                        path, = run
                        results.append(self._crashed(path, in_inbox, key, tried))
                        continue
                recorded += attempts.record(run.values())
                for path, key in run.items():
                    self._check_stop()
                    attempts.current = key
                    results.append(self._process_one(path, in_inbox))
                    if results[-1].outcome in ("committed", "duplicate", "quarantined"):
                        finished.add(key)   # its row goes with its commit
                if suspect:
                    self._flush()
        except Interrupted:
            pass  # the inputs done so far are committed below
        except BaseException:
            self._group = None
            attempts.give_up(recorded)
            raise
        finally:
            attempts.current = None
        try:
            self._flush()
        except BaseException:
            attempts.give_up(recorded)
            raise
        finally:
            self._group = None
        attempts.give_up([k for k in recorded if k not in finished])
        return results

    def _crashed(self, path: Path, in_inbox: bool, key: str, tried: int) -> Result:
        """Quarantine an input that processes died on ``tried`` times, unread."""
        exc = InputRejected("internal_error", f"the process ended {tried} times while this "
                            "input was processed (limits.max_attempts="
                            f"{self.settings.limits.max_attempts}); not tried again",
                            attempts=tried)
        self._attempts.current = key
        return self._quarantine(path, self._input_name(path), in_inbox, exc, self.wall(),
                                self.monotonic())

    def _flush(self) -> None:
        """Commit the open group's inputs in ONE transaction, then finish each."""
        self._group.flush(self.store, self.settings, self.layout)

    def _commit(self, commit: InputCommit, version: int, result: Result, move: MoveOut,
                announce: Callable[[], None] | None = None) -> None:
        """Commit one input now, or (inside a group) when the group is committed; then
        ``announce()`` and the input moved out (``move``)."""
        commit = replace(commit, attempt=self._attempts.current)
        if self._group is not None:
            self._group.add(Pending(commit, result, version, 0.0, announce, move))
        else:
            commit_one(self.store, self.settings, self.layout, commit, version, announce,
                       move)

    def _process(self, path: Path, name: str, in_inbox: bool, seen_at: float) -> Result:
        kind = input_kind(name)
        limits = self.settings.limits
        with open_input(path) as f:
            pin = os.fstat(f.fileno())   # the file read, as it was when reading began
            size = pin.st_size
            if size == 0:
                raise InputRejected("empty", "the input is empty (0 bytes)", size=0)
            if size > limits.max_file_bytes:
                raise InputRejected("too_large", f"{size} bytes, more than "
                                    f"limits.max_file_bytes={limits.max_file_bytes}", size=size)
            if kind is None:
                raise InputRejected("unsupported_type", "expected a name ending in .csv, "
                                    ".csv.gz, .tsv, .tsv.gz, .parquet or .pq", size=size)
            self._check_stop()
            entry = LedgerEntry(digest="", name=name, size=size, outcome="committed",
                                seen_at=seen_at)
            # The content hash is made in a thread while the input is learned as if new
            # (unless the digest is at hand before reading): an input the ledger already
            # has is dropped as soon as it is known (nothing of it was kept) and taken
            # as below.
            threaded = size >= THREADED_BYTES
            move = MoveOut(path, in_inbox, pin)
            algorithm = self.store.digest_algorithm
            with file_digest(f, algorithm, threaded) as hashing:
                claim = Claim(name, hashing, self.store,
                              self._group.entries() if self._group is not None else [])
                try:
                    try:
                        result = None
                        if claim.poll() in (None, NEW):
                            result = self._learn(f, kind, threaded, entry, claim, move)
                        if result is None:   # the ledger has this content
                            if claim.decide() == ALREADY_DONE:
                                if self._group:
                                    self._flush()  # moved once its ledger row is committed
                                move_to_processed(self.settings, self.layout, move)
                                return Result("already_done", name,
                                              model_version=self.state.version)
                            f.seek(0)
                            result = self._duplicate(f, kind, threaded,
                                                     replace(entry, digest=claim.digest), move)
                    except (OSError, sqlite3.Error, ServiceError):
                        raise   # a fault to retry, a stop, or a reason already given
                    except Exception as exc:   # a failure that belongs to this input alone
                        raise InputRejected("internal_error", f"{type(exc).__name__}: {exc}",
                                            exception=type(exc).__name__) from exc
                except InputRejected as exc:
                    try:
                        exc.facts.setdefault("digest", hashing.result())
                        exc.facts.setdefault("digest_algorithm", algorithm)
                    except (OSError, RuntimeError):
                        pass
                    exc.facts.setdefault("size", size)
                    raise
        return result

    # -- the stages ----------------------------------------------------------------
    def _read(self, f: BinaryIO, kind: str, threaded: bool) -> prefetch:
        """The input's frames (:func:`read_frames`), pass-through columns conformed to
        the stream's labels schema; the lines of CSV rows skipped kept."""
        self._conformer = Conformer(self._labels_schema, kind,
                                    dict(self.settings.passthrough_types))
        self._skipped = []
        return read_frames(f, kind, self.settings, self.state, self._conformer,
                           self._skipped, self.stop, threaded)

    def _labels_out(self, tables: Iterable) -> Iterable:
        """The labels tables as written: segment names added (``output.segment_names``),
        a stop request checked before each."""
        return stop_checked(self._named(tables), self.stop)

    def _labels_file(self, name: str, digest: str, threaded: bool) -> LabelsFile:
        """The labels file of input ``name``, under a temporary name until kept."""
        fmt = self.settings.output.format
        target = self.layout.outbox / labels_name(name, digest or "0" * 16, fmt)
        return LabelsFile(target, fmt, sync_folder=self._group is None, threaded=threaded)

    def _keep_labels(self, out: LabelsFile, f: BinaryIO, pin: os.stat_result, name: str,
                     digest: str, version: int | None) -> Path:
        """Name the labels of an input decided and unchanged; the skipped rows' sidecar."""
        check_unchanged(f, pin, name)   # not named for a file that has changed since
        labels = out.keep(labels_metadata(digest, self.store.digest_algorithm, name, version),
                          self.layout.outbox / labels_name(name, digest,
                                                           self.settings.output.format))
        if self._skipped:
            self.rows_skipped += note_skipped(labels, name, self._skipped,
                                              sync_folder=self._group is None)
        return labels

    def _named(self, tables):
        """Labels tables with the ``segment_name`` column when ``output.segment_names``."""
        if not self.settings.output.segment_names:
            return tables
        return with_segment_names(tables, segment_names(self.store.db))

    def _duplicate(self, f: BinaryIO, kind: str, threaded: bool, entry: LedgerEntry,
                   move: MoveOut) -> Result:
        """Same content under another name: labels written, the model not updated."""
        st = self.state
        count = RowCount()
        kept: list[tuple] = []   # before the first model: rows kept to be labelled by it
        with self._read(f, kind, threaded) as frames, \
                self._labels_file(entry.name, entry.digest, frames.threaded) as out:
            frames = count.counted(frames, st.mixture, observed_floor(self.settings))
            if st.mixture is None:   # kept once counted: which rows are valid is known
                frames = keep_rows(frames, kept)
            out.write_all(self._labels_out(scored_tables(
                frames, st.mixture, Unusual.from_extra(st.extra), st.version)))
            labels = self._keep_labels(out, f, move.pin, entry.name, entry.digest,
                                       st.version)
        entry = replace(entry, outcome="duplicate", labels=labels.name, rows=count.rows,
                        rows_invalid=count.invalid)
        result = Result("duplicate", entry.name, count.rows, count.invalid, labels,
                        model_version=st.version, rows_outside_domain=count.outside)
        waiting = None
        if kept:
            waiting = WarmupInput(labels.name, np.concatenate([r for r, _ in kept]),
                                  np.concatenate([v for _, v in kept]), learned=False)
        fixed = self._conformer.fixed   # the stream's types, if this input fixed them
        commit = InputCommit(entry, learned=False, duplicate_rows=None if waiting is None
                             else (waiting.rows, waiting.valid),
                             labels_schema=None if fixed is None else schema_text(fixed))
        if fixed is not None:
            self._labels_schema = fixed
        self._commit(commit, st.version, result, move)
        if waiting is not None and len(waiting.rows):
            self.state = replace(self.state,
                                 warmup_inputs=self.state.warmup_inputs + [waiting])
        return result

    def _learn(self, f: BinaryIO, kind: str, threaded: bool, entry: LedgerEntry,
               claim: Claim, move: MoveOut) -> Result | None:
        """Learn a new input and queue its commit; None if the claim finds, as the
        digest becomes known, that its content is not new (nothing of it kept)."""
        st = self.state
        version = st.version + 1
        extra = dict(st.extra)
        watch = None
        if self.settings.drift.enabled:
            watch = self.monitor.begin(extra.get("drift"), version=version, file=entry.name,
                                       unusual_below=extra.get("unusual_below"))
            watch.transforms = st.transforms
        life = self._life(extra.get("lifecycle"), version, entry.name)
        if life is not None:
            life.transforms = st.transforms
        rebaseline = None
        if watch is not None and st.mixture is not None:
            rebaseline = self.store.pending_rebaseline()
            if rebaseline is not None and self._group is not None and \
                    self._group.applies(rebaseline[0]):
                rebaseline = None  # applied by an input of the open group
            if rebaseline is not None:
                watch.rebaseline(st.mixture, rebaseline[1])
        run = InputLearning(self.settings, st, extra, version, watch, life, self._clock, self.stop)
        with self._read(f, kind, threaded) as frames, \
                self._labels_file(entry.name, "", frames.threaded) as out:
            out.write_all(self._labels_out(run.labelled(run.learned(run.checked(
                until_claimed(frames, claim))))))
            # the new model version is made while the writer's thread finishes the labels
            # file and the digest's its hash (a first model after: it relabels files)
            make = functools.partial(learned_model, self.settings, self.layout, self.store, st,
                                     run, watch, life, rebaseline, wall=self.wall, stop=self.stop,
                                     stream_schema=self._labels_schema, named=self._named)
            model = make() if st.mixture is not None and claim.poll() in (None, NEW) else None
            if claim.decide() != NEW:
                return None
            labels = self._keep_labels(out, f, move.pin, entry.name, claim.digest,
                                       run.labels_version)
        fixed = self._conformer.fixed
        learned = learned_commit(model or make(), st, run, entry, claim.digest, labels, watch,
                                 life, rebaseline, fixed_schema=fixed,
                                 listeners=self.alert_listeners)
        if fixed is not None:
            self._labels_schema = fixed   # as the commit keeps it
        self._commit(learned.commit, version, learned.result, move, learned.announce)
        self.state = learned.state
        return learned.result

    def _life(self, state: dict | None, version: int, file: str) -> LifeWatch | None:
        """Births, retirements and merges for one input (None when switched off)."""
        if not self.settings.lifecycle.enabled:
            return None
        from shoal.daemon.segments.segment_life import LifeWatch

        return LifeWatch(self.settings, state, version=version, file=file)

    def rebaseline_now(self, request_id: int, note: str) -> list[tuple[str, dict]]:
        """Apply a re-baseline request to the latest checkpoint (no input needed)."""
        self.state, alerts = rebaseline_committed(self.monitor, self.store, self.state,
                                                  request_id, note, self.alert_listeners)
        return alerts

    # -- endings -------------------------------------------------------------------
    def _quarantine(self, path: Path, name: str, in_inbox: bool, exc: InputRejected,
                    seen_at: float, t0: float) -> Result:
        if self._group:
            self._flush()  # the inputs before it first: the ledger keeps their order
        if self._conformer is not None and self._conformer.fixed is not None:
            text = self.store.labels_schema()   # types this input fixed are not kept
            self._labels_schema = None if text is None else schema_from_text(text)
        if quarantine_input(self.store, self.layout, path, name, in_inbox, exc, seen_at,
                            self.wall(), self._attempts.current, self.monotonic() - t0):
            # what failed may have changed the model's objects part-way: the state is
            # taken again from the store (which holds every input before this one)
            self.state = self.load_state()
        return Result("quarantined", name, reason=exc.reason, detail=exc.detail)

    # -- label only ----------------------------------------------------------------
    def label_only(self, path: Path, out: Path) -> Result:
        """Label ``path`` with the current model into ``out``; no learning, no commit. The
        labels file's metadata gives the input's digest in the store's algorithm."""
        return label_with_model(self.settings, self.store, self.state, self._labels_schema,
                                path, out, self.stop, THREADED_BYTES, self._named)
