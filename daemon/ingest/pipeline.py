"""One input, start to finish: claim, read, validate, score, learn, write, commit.

:class:`Pipeline` owns the model. ``process`` takes one file through the
design's data flow and returns what happened. Nothing is visible outside
until the labels file is renamed into place, and the model, the ledger row
and the segment history are committed in one transaction afterwards; the
input is moved to ``processed/`` only after that. A stop request abandons the
input uncommitted (it is redone on restart, identically).

An input streams through in frames of 65,536 rows (whatever record batches the
file holds), so memory does not grow with its size: each frame is scored and
learned, and its labels appended to the labels temp file. For inputs of 8 MiB
and more, the content hash, the reading and the labels writing run in threads
beside the model's work, which never waits for the hash: the ledger is asked
as soon as the hash is known (at the latest when the last labels are written),
before the labels file is named, and an input it already has is taken again as
a duplicate (or found done) with nothing of the first attempt kept.

:meth:`Pipeline.process_group` takes several inputs in order as one group: each
is learned from the state the one before it left and its labels file written as
usual, but their commits are made together in ONE transaction at the end (each
with its own ledger row and model version; a crash loses the whole group or
nothing), with one fsync of the outbox folder covering every labels file's
rename, and only the last input's checkpoint stored. The inputs are moved to
``processed/`` after that commit.
"""
from __future__ import annotations

import contextlib
import errno
import json
import logging
import os
import sqlite3
import stat as stat_mod
import threading
import time
import traceback
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any, BinaryIO, Callable, Iterable

import numpy as np
import pyarrow as pa

from shoal.config import Settings
from shoal.core import (
    FeatureTransforms,
    Mixture,
    ModelError,
    NotEnoughDataError,
    ShoalError,
    StepSchedule,
    initialise,
    select_n_components,
)
from shoal.core import kernel_check
from shoal.daemon.files.digest import digest_file
from shoal.daemon.errors import (
    InputRefused,
    InputRejected,
    InputChanged,
    InputVanished,
    Interrupted,
    ServiceError,
    StateError,
)
from shoal.daemon.files.gaps import Unusual, admit, complete_rows, frame_observed, observed_counts
from shoal.daemon.intake.gate import input_kind
from shoal.daemon.files.layout import Layout
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.files.quarantine import move_out, quarantine
from shoal.daemon.segments.segment_names import name_alerts, segment_names, with_segment_names
from shoal.daemon.files.readers import Frame, file_digest, iter_frames, prefetch
from shoal.daemon.files.labels_schema import (
    LABELS_SCHEMA_VERSION,
    Conformer,
    schema_from_text,
    schema_text,
)
from shoal.daemon.files.times import RowTimes, row_times
from shoal.daemon.state.store import (
    Checkpoint,
    HistoryRow,
    InputCommit,
    LedgerEntry,
    StateStore,
    WarmupInput,
)
from shoal.daemon.model import transforming
from shoal.daemon.files.writer import (
    atomic_file,
    display_name,
    fsync_dir,
    labels_name,
    labels_table,
    relabel_file,
    write_labels_stream,
)

if TYPE_CHECKING:
    from shoal.daemon.segments.monitor import DriftMonitor, InputWatch
    from shoal.daemon.segments.segment_life import LifeWatch

__all__ = ["Pipeline", "Result", "ModelState", "open_input", "labels_metadata", "history_rows",
           "UNUSUAL_MEMORY_ROWS"]

# A learned input moves the unusual-row threshold this far towards its own quantile:
# weight n / (n + UNUSUAL_MEMORY_ROWS), i.e. the threshold follows roughly the last
# UNUSUAL_MEMORY_ROWS rows.
UNUSUAL_MEMORY_ROWS = 50_000
# Inputs from this size on are hashed, read, learned and written by overlapping threads;
# smaller ones in the worker's thread (starting a thread can take a few ms: a switch
# interval of the interpreter lock).
_THREADED_BYTES = 8 << 20
# Quarantine reasons of failures nobody foresaw (logged with their traceback).
_UNEXPECTED = ("unreadable", "internal_error")


@dataclass
class Result:
    # committed | duplicate | already_done | quarantined | vanished | refused | changed
    # (| failed, in shoal ingest's report)
    outcome: str
    name: str
    rows: int = 0
    rows_invalid: int = 0
    labels: Path | None = None
    reason: str | None = None
    detail: str | None = None
    model_version: int | None = None
    rows_outside_domain: int = 0   # of rows_invalid: outside a transform's domain


@dataclass
class _Pending:
    """An input of the open group: processed, its labels written, its commit not yet made."""
    commit: InputCommit
    result: Result
    version: int                        # the model version after it
    duration: float                     # seconds its processing took
    after: list[Callable[[], None]] = field(default_factory=list)  # once committed


@dataclass
class ModelState:
    version: int = 0
    mixture: Mixture | None = None
    extra: dict[str, Any] = field(default_factory=dict)
    warmup: np.ndarray | None = None   # buffered rows while mixture is None
    transforms: FeatureTransforms | None = None   # the model's (fixed at warm-up)
    # the inputs of the warm-up rows, labelled once the first model exists
    warmup_inputs: list[WarmupInput] = field(default_factory=list)


# Errors of opening an input that may pass: out of descriptors or memory, permissions
# not yet set by the producer, an I/O error.
_TRANSIENT_OPEN = frozenset({errno.EMFILE, errno.ENFILE, errno.ENOMEM, errno.EACCES,
                             errno.EPERM, errno.EIO, errno.EAGAIN, errno.EINTR})


def open_input(path: Path) -> BinaryIO:
    """Open a regular file for reading without following links or blocking on FIFOs."""
    flags = os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | os.O_CLOEXEC
    try:
        fd = os.open(path, flags)
    except FileNotFoundError as exc:
        raise InputVanished(f"{path.name} no longer exists") from exc
    except OSError as exc:  # ELOOP: a symlink; ENXIO: a socket
        if exc.errno in _TRANSIENT_OPEN:
            raise   # retried in order (the service's fault path), not refused for good
        raise InputRefused(f"{path.name} cannot be opened as a regular file: "
                           f"{exc.strerror}") from exc
    st = os.fstat(fd)
    if not stat_mod.S_ISREG(st.st_mode):
        os.close(fd)
        raise InputRefused(f"{path.name} is not a regular file")
    os.set_blocking(fd, True)
    return os.fdopen(fd, "rb")


class Pipeline:
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
        self._group: list[_Pending] | None = None   # the open group (process_group)
        self._attempt: str | None = None   # the attempt key of the input in progress
        self._attempted: set[str | None] = set()   # attempt keys this process recorded
        self._time_unit_said: str | None = None   # the epoch unit last said inferred
        self._conformer: Conformer | None = None   # the input in progress's
        self._skipped: list[int] = []   # lines of CSV rows skipped (input.bad_rows: skip)
        self.rows_skipped = 0           # since start, for the metrics
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
        """Drift evaluation with the settings in force (they may be reloaded)."""
        from shoal.daemon.segments.monitor import DriftMonitor

        return DriftMonitor(self.settings)

    # -- state ---------------------------------------------------------------------
    def load_state(self) -> ModelState:
        text = self.store.labels_schema()
        self._labels_schema = None if text is None else schema_from_text(text)
        version = self.store.model_version
        cp = self.store.latest_checkpoint()
        if cp is None:
            return ModelState(version=version, warmup=self.store.warmup_rows(),
                              warmup_inputs=self.store.warmup_inputs(),
                              transforms=transforming.configured(self.settings))
        if cp.version != version:
            raise StateError(f"state store's latest checkpoint is version {cp.version} but "
                             f"the model version is {version}")
        meta = cp.meta
        schedule = meta.get("schedule")
        half_life = self.settings.half_life_rows
        if isinstance(schedule, dict) and None not in (schedule.get("half_life_rows"), half_life) \
                and schedule["half_life_rows"] != half_life:
            # a new half-life is taken from the next row on (shoal.daemon.model.contract)
            meta = {**meta, "schedule": {**schedule, "half_life_rows": half_life}}
        try:
            mixture = Mixture.from_state(cp.arrays, meta)
        except (ModelError, KeyError, TypeError, ValueError, AttributeError) as exc:
            raise StateError(f"checkpoint {cp.version} in {self.store.path} cannot be loaded "
                             f"({type(exc).__name__}: {exc}); the state is unusable: restore "
                             "the state folder from a backup") from exc
        if mixture.n_features != len(self.settings.features):
            raise StateError(f"the stored model has {mixture.n_features} features but the "
                             f"config lists {len(self.settings.features)}; use a new state "
                             "folder for a different feature set")
        transforms = transforming.from_meta(cp.meta, mixture.n_features)
        transforming.check_stored(transforms, self.settings)
        return ModelState(version=version, mixture=mixture, extra=cp.extra,
                          transforms=transforms)

    def _input_name(self, path: Path) -> str:
        """An input's name in the ledger, logs and labels: its file name, or with
        ``watch.recursive`` its path relative to the inbox (``2025/05/a.csv``)."""
        if self.settings.watch.recursive:
            try:
                rel = path.relative_to(self.layout.inbox)
            except ValueError:
                rel = None
            if rel is not None and len(rel.parts) > 1:
                return display_name(rel.as_posix())
        return display_name(path.name)

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
        if self._group and self._group[-1].result is result:
            self._group[-1].duration = duration  # logged once committed
        else:
            _log_result(result, duration)
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
        self._group = []
        results: list[Result] = []
        recorded: list[str] = []      # attempts recorded by this call
        finished: set[str | None] = set()
        try:
            for run, suspect in self._attempt_runs([Path(p) for p in paths]):
                self._check_stop()
                if suspect:
                    self._flush()   # the inputs before it are not lost with it
                    key, = run.values()
                    tried = self.store.attempts([key])[key]
                    if tried >= self.settings.limits.max_attempts:
                        path, = run
                        results.append(self._crashed(path, in_inbox, key, tried))
                        continue
                new = [k for k in run.values() if k is not None and k not in self._attempted]
                self.store.attempts(new, add=1)
                self._attempted.update(new)
                recorded += new
                for path, key in run.items():
                    self._check_stop()
                    self._attempt = key
                    results.append(self._process_one(path, in_inbox))
                    if results[-1].outcome in ("committed", "duplicate", "quarantined"):
                        finished.add(key)   # its row goes with its commit
                if suspect:
                    self._flush()
        except Interrupted:
            pass  # the inputs done so far are committed below
        except BaseException:
            self._group = None
            self._give_up_attempts(recorded)
            raise
        finally:
            self._attempt = None
        try:
            self._flush()
        except BaseException:
            self._give_up_attempts(recorded)
            raise
        finally:
            self._group = None
        self._give_up_attempts([k for k in recorded if k not in finished])
        return results

    def _give_up_attempts(self, keys: list[str]) -> None:
        """Take back the attempts of inputs this process gave up cleanly (a stop, a fault
        to retry, an input not taken after all): only a death leaves one behind."""
        if not keys:
            return
        self._attempted.difference_update(keys)
        try:
            self.store.attempts(keys, add=-1)
        except (OSError, sqlite3.Error) as exc:   # a full disk: counted once more, no more
            log_event("attempts_not_cleared", logging.WARNING, inputs=len(keys),
                      detail=f"{type(exc).__name__}: {exc}")

    def _attempt_runs(self, paths: list[Path]):
        """``paths`` in order as runs ``({path: attempt key}, suspect)``: an input with an
        attempt of an earlier process alone (suspect), the others together."""
        keys = {p: _attempt_key(p) for p in paths}
        prior = self.store.attempts([k for k in keys.values()
                                     if k is not None and k not in self._attempted])
        run: dict[Path, str | None] = {}
        for path, key in keys.items():
            if key is not None and prior.get(key, 0) > 0:
                if run:
                    yield run, False
                    run = {}
                yield {path: key}, True
            else:
                run[path] = key
        if run:
            yield run, False

    def _crashed(self, path: Path, in_inbox: bool, key: str, tried: int) -> Result:
        """Quarantine an input that processes died on ``tried`` times, unread."""
        exc = InputRejected("internal_error", f"the process ended {tried} times while this "
                            "input was processed (limits.max_attempts="
                            f"{self.settings.limits.max_attempts}); not tried again",
                            attempts=tried)
        self._attempt = key
        return self._quarantine(path, self._input_name(path), in_inbox, exc, self.wall(),
                                self.monotonic())

    def _flush(self) -> None:
        """Commit the open group's inputs in ONE transaction, then finish each."""
        pending, self._group[:] = list(self._group), []
        if not pending:
            return
        if any(p.result.labels is not None for p in pending):
            fsync_dir(self.layout.outbox)  # the labels files' renames, before the commit
        versions = self.store.commit_inputs([p.commit for p in pending])
        if versions != [p.version for p in pending]:
            raise StateError(f"the state store's model versions {versions} are not the "
                             f"ones the group was learned as {[p.version for p in pending]}")
        for p in pending:
            _log_result(p.result, p.duration)
            for step in p.after:
                step()

    def _commit(self, commit: InputCommit, version: int, result: Result,
                *after: Callable[[], None]) -> None:
        """Commit one input now, or (inside a group) when the group is committed;
        ``after`` runs once the commit is durable."""
        commit = replace(commit, attempt=self._attempt)
        if self._group is not None:
            self._group.append(_Pending(commit, result, version, 0.0, list(after)))
            return
        committed = self.store.commit_inputs([commit])[0]
        if committed != version:
            raise StateError(f"the state store's model version {committed} is not the "
                             f"version {version} the input was learned as")
        for step in after:
            step()

    def _pending_done(self, digest: str) -> list[LedgerEntry]:
        """Inputs of the open group with this content digest (committed or duplicate)."""
        return [p.commit.entry for p in self._group or () if p.commit.entry.digest == digest]

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
            # The content hash is made in a thread while the input is learned as if new;
            # the ledger is asked once the hash is known, before the labels file is
            # named: an input it already has is dropped there (nothing of it was kept)
            # and taken as below.
            threaded = size >= _THREADED_BYTES
            algorithm = self.store.digest_algorithm
            with file_digest(f, algorithm, threaded) as hashing:
                def claim() -> str:
                    digest = hashing.result()
                    done = self.store.find_done(digest) + self._pending_done(digest)
                    if done:
                        raise _Seen(digest, done)
                    return digest

                def unchanged() -> None:
                    """Raise InputChanged if the file grew or was rewritten since it was
                    opened (a writer that paused past the settle time): not committed."""
                    now = os.fstat(f.fileno())
                    if (now.st_size, now.st_mtime_ns) != (pin.st_size, pin.st_mtime_ns):
                        raise InputChanged(f"{name} changed while it was read ({pin.st_size}"
                                           f" -> {now.st_size} bytes); taken again once "
                                           "settled")

                try:
                    try:
                        try:
                            result = self._learn(self._frames(f, kind, threaded), entry,
                                                 claim, unchanged, hashing.ready)
                        except _Seen as seen:
                            if any(e.name == name for e in seen.done):
                                if self._group:
                                    self._flush()  # moved once its ledger row is committed
                                self._finish(path, in_inbox, pin)
                                return Result("already_done", name,
                                              model_version=self.state.version)
                            f.seek(0)
                            result = self._duplicate(self._frames(f, kind, threaded),
                                                     _with(entry, digest=seen.digest),
                                                     unchanged)
                    except (OSError, sqlite3.Error, ServiceError):
                        raise   # a fault to retry, a stop, or a reason already given
                    except Exception as exc:   # a failure that belongs to this input alone
                        raise InputRejected("internal_error", f"{type(exc).__name__}: {exc}",
                                            exception=type(exc).__name__) from exc
                except InputRejected as exc:
                    with contextlib.suppress(OSError, RuntimeError):
                        exc.facts.setdefault("digest", hashing.result())
                        exc.facts.setdefault("digest_algorithm", algorithm)
                    exc.facts.setdefault("size", size)
                    raise
        finish = lambda: self._finish(path, in_inbox, pin)  # noqa: E731
        if self._group:
            self._group[-1].after.append(finish)  # after the group's commit
        else:
            finish()
        return result

    def _frames(self, f: BinaryIO, kind: str, threaded: bool) -> prefetch:
        """The input's frames, read in a thread a few frames ahead of the model; with a
        model, checked against its range as they are read (:func:`_mark_beyond_model`);
        their pass-through columns in the stream's types (:mod:`labels_schema`)."""
        mixture = self.state.mixture
        transforms = self.state.transforms
        self._conformer = Conformer(self._labels_schema, kind,
                                    dict(self.settings.passthrough_types))
        self._skipped = []
        if transforms is not None and not transforms.identity:
            # the features go to the model's units in the reader thread (before the
            # first model only checked: the warm-up rows stay in the data's units); the
            # model's range, in those units, is checked afterwards (_mark_beyond_model)
            frames = transforming.transformed_frames(
                iter_frames(f, kind, self.settings, self.stop.is_set,
                            skipped=self._skipped), transforms,
                self.settings.features, check_only=mixture is None)
        else:
            frames = iter_frames(f, kind, self.settings, self.stop.is_set,
                                 model_range=None if mixture is None
                                 else _model_range(mixture), skipped=self._skipped)
        return prefetch(self._conformer.frames(frames), threaded=threaded)

    def _fixed_schema(self) -> str | None:
        """The pass-through types the input just read fixed for the stream (its first),
        as the commit keeps them; None when they were fixed before."""
        fixed = self._conformer.fixed if self._conformer is not None else None
        if fixed is None:
            return None
        self._labels_schema = fixed
        return schema_text(fixed)

    def _write(self, frames: prefetch, tables: Callable[[Iterable[Frame]], Iterable[pa.Table]],
               entry: LedgerEntry, version: Callable[[], int | None],
               claim: Callable[[], str] | None = None,
               ready: Callable[[], bool] | None = None,
               unchanged: Callable[[], None] = lambda: None) -> tuple[Path, str]:
        """Write the labels ``tables(frames)`` as they are made; returns the file and the
        input's content digest. ``claim()`` gives the digest (when ``entry`` has none yet) and
        ``version()`` the labels' model version (None without scores): as the first
        table is written if ``ready()`` says the hash is known, else after the first
        table for which it is (the hash is made beside the model, which does not wait
        for it), at the latest once the last table is written."""
        fmt = self.settings.output.format
        digest = [entry.digest]
        algorithm = self.store.digest_algorithm

        def metadata() -> dict:
            if claim is not None:
                digest[0] = claim()
            return labels_metadata(digest[0], algorithm, entry.name, version())

        def checked(frames):
            for table in self._named(tables(frames)):
                self._check_stop()
                yield table
        def final() -> Path:
            unchanged()   # the labels are not named for a file that has changed since
            return self.layout.outbox / labels_name(entry.name, digest[0], fmt)

        # named after a placeholder digest until the digest is known
        target = self.layout.outbox / labels_name(entry.name, entry.digest or "0" * 16, fmt)
        with frames:
            path = write_labels_stream(
                checked(frames), target, fmt, metadata,
                sync_folder=self._group is None,  # a group syncs it once
                final=final,
                threaded=frames.threaded, ready=ready)
        if self._skipped:
            self._note_skipped(path, entry.name)
        return path, digest[0]

    def _note_skipped(self, labels: Path, name: str) -> None:
        """The lines of rows skipped (``input.bad_rows: skip``) in a sidecar next to the
        labels (``_<labels file>.bad_rows.json``, written before the commit: the leading
        ``_`` keeps dataset readers, pyarrow's among them, from taking it for data), a
        log line and the count."""
        lines = list(self._skipped)
        sidecar = labels.with_name(f"_{labels.name}.bad_rows.json")
        with atomic_file(sidecar, sync_folder=self._group is None) as f:
            f.write(json.dumps({"input": name, "labels": labels.name, "rows_skipped":
                                len(lines), "lines": lines}).encode())
        self.rows_skipped += len(lines)
        log_event("rows_skipped", logging.WARNING, file=name, rows=len(lines),
                  lines=lines[:20], sidecar=sidecar.name)

    def _duplicate(self, frames: prefetch, entry: LedgerEntry,
                   unchanged: Callable[[], None]) -> Result:
        """Same content under another name: labels written, the model not updated."""
        st = self.state
        count = _Count()
        kept: list[tuple] = []   # before the first model: rows kept to be labelled by it

        def tables(frames):
            frames = count.counted(frames, st.mixture, self._floor())
            if st.mixture is None:   # kept once counted: which rows are valid is known
                frames = _kept(frames, kept)
            return _scored_tables(frames, st.mixture, Unusual.from_extra(st.extra), st.version)
        labels, _ = self._write(frames, tables, entry, lambda: st.version,
                                unchanged=unchanged)
        entry = _with(entry, outcome="duplicate", labels=labels.name, rows=count.rows,
                      rows_invalid=count.invalid)
        result = Result("duplicate", entry.name, count.rows, count.invalid, labels,
                        model_version=st.version, rows_outside_domain=count.outside)
        waiting = None
        if kept:
            waiting = WarmupInput(labels.name, np.concatenate([r for r, _ in kept]),
                                  np.concatenate([v for _, v in kept]), learned=False)
        self._commit(InputCommit(entry, learned=False, labels_schema=self._fixed_schema(),
                                 duplicate_rows=None if waiting is None
                                 else (waiting.rows, waiting.valid)),
                     st.version, result)
        if waiting is not None and len(waiting.rows):
            self.state = replace(self.state,
                                 warmup_inputs=self.state.warmup_inputs + [waiting])
        return result

    def _learn(self, frames: prefetch, entry: LedgerEntry, claim: Callable[[], str],
               unchanged: Callable[[], None], ready: Callable[[], bool] | None = None
               ) -> Result:
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
            if rebaseline is not None and any(p.commit.rebaseline == rebaseline[0]
                                              for p in self._group or ()):
                rebaseline = None  # applied by an input of the open group
            if rebaseline is not None:
                watch.rebaseline(st.mixture, rebaseline[1])
        run = _Run(self, extra, version, watch, life)
        labels, digest = self._write(frames, run.tables, entry,
                                     lambda: version if run.scored else None, claim, ready,
                                     unchanged)
        mixture, extra = run.mixture, run.extra
        warmup_keep, clear_warmup = run.warmup_keep, run.clear_warmup
        if mixture is not None and st.mixture is None:
            # the inputs before this one wait with null segments: the first model labels
            # them, and their rows count in the segments' row counts (as in backfill)
            extra = _count_rows(extra, self._label_warmup_inputs(
                mixture, run.transforms, run.first_unusual, version))
        if mixture is not None:
            extra = self._born(extra, mixture, version)
        if watch is not None and watch.state is not None:
            extra["drift"] = watch.state
        if life is not None and mixture is not None:
            extra["lifecycle"] = life.final_state()
        checkpoint = history = None
        if mixture is not None:
            arrays, meta = mixture.to_state()
            meta = transforming.to_meta(meta, run.transforms)
            checkpoint = Checkpoint(version, arrays, meta, extra)
            history = history_rows(mixture, extra,
                               watch.segment_drift() if watch is not None else None,
                               run.transforms)
            if life is not None:
                history = life.history(history)
        entry = _with(entry, digest=digest, labels=labels.name, rows=run.rows,
                      rows_invalid=run.invalid)
        self._check_stop()
        alerts = name_alerts((watch.alerts if watch is not None else []) +
                             (life.alerts if life is not None else []),
                             segment_names(self.store.db))
        applied = rebaseline is not None and watch.rebaselined
        commit = InputCommit(entry, learned=True, checkpoint=checkpoint,
                             labels_schema=self._fixed_schema(),
                             warmup_rows=warmup_keep, warmup_valid=run.warmup_valid,
                             clear_warmup=clear_warmup,
                             history=history or (), alerts=alerts,
                             rebaseline=rebaseline[0] if applied else None)
        if checkpoint is not None:
            # Only the group's last checkpoint is stored: those before it are not needed.
            for p in self._group or ():
                if p.commit.checkpoint is not None:
                    p.commit = replace(p.commit, checkpoint=None)

        def after() -> None:
            if applied:
                log_event("drift_rebaselined", model_version=version, note=rebaseline[1])
            if watch is not None:
                watch.log_alerts(version)
            if life is not None:
                life.log_events(version)
            if alerts:
                for listener in self.alert_listeners:
                    listener(version)

        result = Result("committed", entry.name, run.rows, run.invalid, labels,
                        model_version=version, rows_outside_domain=run.outside)
        self._commit(commit, version, result, after)
        buffered, waiting = None, []
        if mixture is None:
            parts = [a for a in (st.warmup, warmup_keep) if a is not None and len(a)]
            buffered = np.concatenate(parts) if parts else None
            waiting = st.warmup_inputs + ([WarmupInput(labels.name, warmup_keep,
                                                       run.warmup_valid)]
                                          if warmup_keep is not None else [])
        self.state = ModelState(version, mixture, extra, buffered, run.transforms, waiting)
        return result

    def _label_warmup_inputs(self, mixture: Mixture, transforms: FeatureTransforms | None,
                             unusual: Unusual, version: int) -> list[np.ndarray]:
        """Write the labels of the inputs taken before the first model again, scored by
        it (``version``: the first model's). Each file is replaced atomically before the
        commit of the input that made the model; a crash before that commit makes the same
        model from the same rows again, and the same files. Returns the segments given."""
        fmt = self.settings.output.format
        given = []
        for waiting in self.state.warmup_inputs:
            if waiting.labels is None:
                continue
            path = self.layout.outbox / waiting.labels
            X, valid = waiting.rows, waiting.valid
            jacobian = None
            if transforms is not None and not transforms.identity:
                inside = transforms.inside(X)
                jacobian = transforms.log_jacobian(X[inside])
                X = transforms.forward(X[inside])[0]
                if valid is not None and not inside.all():
                    valid = valid.copy()
                    valid[np.flatnonzero(valid)[~inside]] = False
            scores = mixture.score(X)
            below = unusual.per_row(observed_counts(X), X.shape[1])
            if waiting.learned:   # a duplicate's rows are labelled, not counted
                given.append(scores.segment)
            try:
                relabel_file(path, fmt, valid, scores, below, version,
                             jacobian, self._named, self._labels_schema)
            except FileNotFoundError:
                log_event("warmup_labels_missing", logging.WARNING, labels=waiting.labels)
            except ValueError as exc:
                log_event("warmup_labels_not_rewritten", logging.WARNING,
                          labels=waiting.labels, detail=str(exc))
        if self.state.warmup_inputs:
            log_event("warmup_inputs_labelled", inputs=len(self.state.warmup_inputs),
                      rows=sum(len(w.rows) for w in self.state.warmup_inputs),
                      model_version=version)
        return given

    def _named(self, tables):
        """Labels tables with the ``segment_name`` column when ``output.segment_names``."""
        if not self.settings.output.segment_names:
            return tables
        return with_segment_names(tables, segment_names(self.store.db))

    def _times(self, frame: Frame) -> RowTimes | None:
        """The times of the valid rows (``drift.time_column``) as UTC instants, or None."""
        drift = self.settings.drift
        name = drift.time_column
        if name is None or name not in frame.passthrough.column_names:
            return None
        got = row_times(frame.passthrough.column(name), drift.time_unit, drift.time_format)
        if got.inferred_unit is not None and got.inferred_unit != self._time_unit_said:
            self._time_unit_said = got.inferred_unit
            log_event("time_unit_inferred", column=name, unit=got.inferred_unit,
                      detail="epoch times as numbers; set drift.time_unit to say which")
        return replace(got, values=got.values[frame.valid])

    def rebaseline_now(self, request_id: int, note: str) -> list[tuple[str, dict]]:
        """Apply a re-baseline request to the latest checkpoint (no input needed)."""
        st = self.state
        if st.mixture is None:
            raise StateError("no model yet: the warm-up has not finished, so there is "
                             "nothing to take as the baseline")
        watch = self.monitor.begin(st.extra.get("drift"), version=st.version, file="",
                                   unusual_below=st.extra.get("unusual_below"))
        if watch is None:
            raise StateError("drift watching is off (drift.enabled: false)")
        watch.transforms = st.transforms
        watch.rebaseline(st.mixture, note)
        extra = dict(st.extra, drift=watch.state)
        self.store.apply_rebaseline(request_id, st.version, extra,
                                    name_alerts(watch.alerts, segment_names(self.store.db)))
        self.state = replace(st, extra=extra)
        log_event("drift_rebaselined", model_version=st.version, note=note)
        watch.log_alerts(st.version)
        if watch.alerts:
            for listener in self.alert_listeners:
                listener(st.version)
        return watch.alerts

    # -- the model -----------------------------------------------------------------
    def _schedule(self) -> StepSchedule:
        s = self.settings
        return StepSchedule(alpha=s.learning.step_exponent, i0=None,
                            half_life_rows=s.half_life_rows)

    def _floor(self) -> int:
        """Features a row needs present to be scored and learned (``min_observed``)."""
        return self.settings.learning.observed_floor(len(self.settings.features))

    def _life(self, state: dict | None, version: int, file: str) -> LifeWatch | None:
        """Births, retirements and merges for one input (None when switched off)."""
        if not self.settings.lifecycle.enabled:
            return None
        from shoal.daemon.segments.segment_life import LifeWatch

        return LifeWatch(self.settings, state, version=version, file=file)

    def _warm_up(self, X: np.ndarray, watch: InputWatch | None = None,
                 life: LifeWatch | None = None, buffered: np.ndarray | None = None):
        """Buffer rows until ``warmup_rows``; then fit the first model.

        ``buffered`` stands for the stored warm-up buffer (its rows transformed).
        Returns ``(mixture or None, scores or None, rows to add to the buffer,
        checkpoint extras of the new model)``.
        """
        s = self.settings
        if buffered is None:
            buffered = self.state.warmup
        if buffered is None:
            buffered = np.empty((0, X.shape[1]))
        # the first model is fitted on complete rows only: warmup_rows of them
        have = int(np.count_nonzero(observed_counts(buffered) == X.shape[1]))
        complete_x = np.cumsum(observed_counts(X) == X.shape[1])
        if have + (int(complete_x[-1]) if len(X) else 0) < s.warmup_rows:
            return None, None, X, {}
        need = int(np.searchsorted(complete_x, s.warmup_rows - have) + 1) \
            if have < s.warmup_rows else 0
        Xw = complete_rows(np.concatenate([buffered, X[:need]]))
        self._check_stop()
        try:
            if s.segments.fixed:
                mixture = initialise(Xw, n_components=s.segments.min, covariance=s.covariance,
                                     seed=s.seed, n_init=s.learning.n_init,
                                     schedule=self._schedule(), reg_covar=s.learning.reg_covar,
                                     refresh_rows=s.learning.refresh_rows)
                table = None
            else:
                mixture, table = select_n_components(
                    Xw, s.segments.min, s.segments.max, covariance=s.covariance, seed=s.seed,
                    n_init=s.learning.n_init, schedule=self._schedule(),
                    reg_covar=s.learning.reg_covar,
                    refresh_rows=s.learning.refresh_rows)
        except NotEnoughDataError as exc:
            log_event("warmup_not_enough_data", logging.WARNING, rows=len(Xw), detail=str(exc))
            return None, None, X, {}
        log_event("model_initialised", rows=len(Xw), segments=int(mixture.n_components),
                  covariance=s.covariance,
                  bic=[{k: (float(v) if k != "n_components" else int(v)) for k, v in r.items()}
                       for r in table] if table else None)
        head = mixture.score(X[:need])
        extra = Unusual.at_warm_up(mixture, Xw, s.output.unusual_quantile, self._floor(),
                                   s.seed).to_extra({})
        if watch is not None:
            watch.start(stream_offset=len(buffered) + need)
            watch.unusual_below = extra["unusual_below"]
            if watch.times is not None:
                watch.times = watch.times[need:]
        if life is not None:
            life.start(stream_offset=len(buffered) + need)
        mixture, tail = self._learn_chunks(mixture, X[need:], watch, life)
        return mixture, _concat(head, tail), None, extra

    def _learn_chunks(self, mixture: Mixture, X: np.ndarray, watch: InputWatch | None = None,
                      life: LifeWatch | None = None):
        """Learn ``X`` in pieces of at most ``chunk_rows`` that never cross a drift window
        boundary (learning does not depend on the cut), showing each piece to ``watch``;
        ``life`` takes its lifecycle decisions at its own fixed points between pieces."""
        parts = []
        step = self.settings.learning.chunk_rows
        start = 0
        try:
            while start < len(X):
                self._check_stop()
                take = min(step, len(X) - start)
                if watch is not None:
                    take = min(take, watch.rows_to_boundary(mixture.n_rows))
                if life is not None:
                    mixture = life.at_boundary(mixture, watch)
                    take = min(take, life.rows_to_boundary(mixture))
                piece = X[start:start + take]
                before = mixture
                mixture, scores = mixture.learn(piece)
                if watch is not None:
                    watch.observe(mixture, piece, scores, start)
                if life is not None:
                    life.observe(before, piece, _complete_only(piece, scores))
                parts.append(scores)
                start += take
        except (ModelError, np.linalg.LinAlgError) as exc:
            raise InputRejected("model_update_failed", f"the model could not learn from this "
                                f"input: {exc}") from exc
        return mixture, (_concat(*parts) if parts else None)

    def _born(self, extra: dict, mixture: Mixture, version: int) -> dict:
        extra = dict(extra)
        born = dict(extra.get("segment_born", {}))
        for sid in mixture.ids.tolist():
            born.setdefault(str(sid), {"version": version, "time": self.wall()})
        extra["segment_born"] = born
        return extra

    def _after_scoring(self, extra: dict, scores, mixture: Mixture,
                       observed: np.ndarray | None = None) -> dict:
        extra = _count_rows(dict(extra), [scores.segment])
        q = self.settings.output.unusual_quantile
        if len(scores.log_density) and "unusual_below" in extra:
            unusual = Unusual.from_extra(extra).follow(
                scores.log_density, observed, mixture.n_features, q, UNUSUAL_MEMORY_ROWS,
                linear_quantile)
            extra = unusual.to_extra(extra)
        return extra

    # -- endings -------------------------------------------------------------------
    def _finish(self, path: Path, in_inbox: bool, pin: os.stat_result) -> None:
        """Move the input read (``pin``: by device and inode, not by name) out of the
        inbox; a file renamed over it meanwhile is a new input and stays."""
        if not in_inbox or self.settings.output.keep_inputs:
            return
        with contextlib.suppress(OSError):
            now = os.lstat(path)
            if (now.st_dev, now.st_ino) == (pin.st_dev, pin.st_ino) and \
                    (now.st_size, now.st_mtime_ns) != (pin.st_size, pin.st_mtime_ns):
                # written to between the check before its commit and now: what was read
                # is committed, what was added since is not labelled; said, not silent
                log_event("input_changed_after_commit", logging.WARNING,
                          file=display_name(path.name), size_read=pin.st_size,
                          size_now=now.st_size, detail="the bytes past size_read are not "
                          "labelled; write inputs elsewhere and rename them in")
        if move_out(path, self.layout.processed, identity=(pin.st_dev, pin.st_ino)) is None \
                and os.path.lexists(path):
            log_event("input_replaced", logging.INFO, file=display_name(path.name),
                      detail="another file took its name while it was processed; that file "
                             "is a new input")

    def _quarantine(self, path: Path, name: str, in_inbox: bool, exc: InputRejected,
                    seen_at: float, t0: float) -> Result:
        if self._group:
            self._flush()  # the inputs before it first: the ledger keeps their order
        if self._conformer is not None and self._conformer.fixed is not None:
            text = self.store.labels_schema()   # types this input fixed are not kept
            self._labels_schema = None if text is None else schema_from_text(text)
        now = self.wall()
        facts = {k: v for k, v in exc.facts.items()}
        sidecar = quarantine(path, self.layout.quarantine, exc.reason, exc.detail,
                             move=in_inbox, now=now, facts=facts)
        self.store.record_quarantine(LedgerEntry(
            digest=facts.get("digest"), name=name, size=int(facts.get("size", 0) or 0),
            outcome="quarantined", reason=f"{exc.reason}: {exc.detail}", seen_at=seen_at,
            finished_at=now), attempt=self._attempt)
        cause = exc.__cause__
        log_event("input_quarantined", logging.WARNING, file=name, reason=exc.reason,
                  detail=exc.detail, sidecar=display_name(sidecar.name),
                  duration=round(self.monotonic() - t0, 4),
                  traceback=None if cause is None or exc.reason not in _UNEXPECTED else
                  "".join(traceback.format_exception(cause)))
        if exc.reason in _UNEXPECTED:
            # what failed may have changed the model's objects part-way: the state is
            # taken again from the store (which holds every input before this one)
            self.state = self.load_state()
        return Result("quarantined", name, reason=exc.reason, detail=exc.detail)

    # -- label only ----------------------------------------------------------------
    def label_only(self, path: Path, out: Path) -> Result:
        """Label ``path`` with the current model into ``out``; no learning, no commit. The
        labels file's metadata gives the input's digest in the store's algorithm."""
        st = self.state
        if st.mixture is None:
            raise StateError("no model yet: the warm-up has not finished "
                             f"({0 if st.warmup is None else len(st.warmup)} of "
                             f"{self.settings.warmup_rows} rows buffered)")
        kind = input_kind(path.name)
        if kind is None:
            raise InputRejected("unsupported_type", "expected a name ending in .csv, .csv.gz, "
                                ".tsv, .tsv.gz, .parquet or .pq")
        fmt = "csv" if out.name.lower().endswith(".csv") else "parquet"
        count = _Count()
        algorithm = self.store.digest_algorithm
        with open_input(path) as f:
            digest = digest_file(f, algorithm)
            with self._frames(f, kind, os.fstat(f.fileno()).st_size >= _THREADED_BYTES) \
                    as frames:
                tables = self._named(_scored_tables(
                    count.counted(frames, st.mixture, self._floor()), st.mixture,
                    Unusual.from_extra(st.extra), st.version))
                write_labels_stream(tables, out, fmt, lambda: labels_metadata(
                    digest, algorithm, display_name(path.name), st.version),
                    threaded=frames.threaded)
        return Result("labelled", display_name(path.name), count.rows, count.invalid, out,
                      model_version=st.version, rows_outside_domain=count.outside)


def _attempt_key(path: Path) -> str | None:
    """What an attempt is recorded under: the file (device, inode) as it stands (size,
    modification time) and its name; None if it cannot be looked at."""
    try:
        st = os.lstat(path)
    except OSError:
        return None
    return f"{st.st_dev}:{st.st_ino}:{st.st_size}:{st.st_mtime_ns}:{display_name(path.name)}"


def _log_result(result: Result, duration: float) -> None:
    log_event(f"input_{result.outcome}", logging.INFO, file=result.name, rows=result.rows,
              rows_invalid=result.rows_invalid or None,
              rows_outside_transform_domain=result.rows_outside_domain or None,
              labels=result.labels.name if result.labels else None,
              model_version=result.model_version, duration=round(duration, 4))


def linear_quantile(x: np.ndarray, q: float) -> float:
    """``np.quantile(x, q)`` (its default, linear method), the same value to the bit, by
    one partition around the lower order statistic and the minimum above it: ~0.36 ms
    for 65,536 values against ~1.8 ms (np.quantile partitions around both), in the model
    thread once a frame. ``x`` is 1-d, finite and not empty; ``0 <= q <= 1``."""
    n = len(x)
    v = (n - 1) * q                  # numpy's virtual index for the linear method
    if v >= n - 1:
        return float(np.max(x))
    lo = int(np.floor(v))
    p = np.partition(x, lo)
    a, b = float(p[lo]), float(np.min(p[lo + 1:]))
    t = v - lo
    d = b - a
    # numpy's _lerp: from the nearer end, so that t = 1 gives b exactly
    return b - d * (1.0 - t) if t >= 0.5 else a + d * t


def labels_metadata(digest: str, algorithm: str, name: str, version: int | None) -> dict:
    """The ``shoal.*`` keys of a labels file's metadata."""
    return {"input_digest": digest, "digest_algorithm": algorithm, "input_name": name,
            "model_version": version, "labels_schema_version": LABELS_SCHEMA_VERSION}


def _with(entry: LedgerEntry, **changes) -> LedgerEntry:
    from dataclasses import replace
    return replace(entry, **changes)


def _concat(*parts):
    parts = [p for p in parts if p is not None]
    if len(parts) == 1:
        return parts[0]
    first = parts[0]
    if len({p.resp.shape[1] for p in parts}) > 1:   # segments born, retired or merged:
        parts = [replace(p, resp=p.resp[:, :0]) for p in parts]   # columns mean nothing
    return type(first)(**{name: np.concatenate([getattr(p, name) for p in parts])
                          for name in first.__dataclass_fields__})


def history_rows(mixture: Mixture, extra: dict, drift: dict | None = None,
                 transforms: FeatureTransforms | None = None) -> list[HistoryRow]:
    """The per-segment history rows of a model version (in the data's units)."""
    means, stds = transforming.history_units(transforms, mixture.data_means(),
                                             mixture.data_stds())
    counts = extra.get("segment_rows", {})
    drift = drift or {}
    return [HistoryRow(segment=int(sid), weight=float(mixture.weights[k]),
                       rows=int(counts.get(str(int(sid)), 0)), mean=means[k].tolist(),
                       spread=stds[k].tolist(), drift=drift.get(str(int(sid))))
            for k, sid in enumerate(mixture.ids.tolist())]


# -- the read -> score -> learn -> labels loop -----------------------------------------
class _Seen(ShoalError):
    """The ledger (or the open group) already has an input of this content (a signal
    caught within the pipeline, never shown)."""

    def __init__(self, digest: str, done: list[LedgerEntry]):
        super().__init__(digest)
        self.digest, self.done = digest, done


class _Count:
    """Rows and rows without a segment of the frames that went through ``counted``."""

    def __init__(self):
        self.rows = self.invalid = self.outside = 0

    def counted(self, frames: Iterable[Frame], mixture: Mixture | None = None,
                floor: int | None = None):
        """The frames, counted; rows with missing features admitted (with ``floor``) and,
        with a model, rows beyond its range marked invalid first (as when they are
        learned, so a duplicate's labels equal the original's)."""
        for frame in frames:
            _admit(frame, floor, mixture)
            if mixture is not None:
                _mark_beyond_model(frame, mixture)
            self.rows += frame.n_rows
            self.invalid += frame.n_invalid
            self.outside += frame.outside_domain
            yield frame


MODEL_RANGE_SDS = 1e6
"""Rows further than this many warm-up standard deviations from the warm-up mean, in any
feature, are invalid once a model exists: finite values that large (a sensor's overflow,
a corrupt number) would swamp the second-moment statistics, which then no longer give a
positive-definite covariance, and every later refresh of the model would fail."""


def _model_range(mixture: Mixture) -> tuple[np.ndarray, np.ndarray]:
    """``(center, limit)``: a feature further than ``limit`` from ``center`` is beyond
    MODEL_RANGE_SDS of ``mixture``'s scale (both frozen at warm-up)."""
    return mixture.center, MODEL_RANGE_SDS * mixture.scale


def _mark_beyond_model(frame: Frame, mixture: Mixture) -> None:
    """Mark invalid the rows of ``frame`` beyond MODEL_RANGE_SDS of ``mixture``'s scale
    (the reader did it already when it read the frame with this model's range)."""
    if frame.n_rows == 0:
        return
    center, limit = _model_range(mixture)
    checked = frame.model_range
    if checked is not None and np.array_equal(checked[0], center) and \
            np.array_equal(checked[1], limit):
        far = frame.beyond_range
    else:
        with np.errstate(invalid="ignore"):   # NaN features (already invalid) compare False
            beyond = np.any(np.abs(frame.features - center) > limit, axis=1)
        beyond &= frame.valid
        far = int(np.count_nonzero(beyond))
        if far:
            frame.valid[beyond] = False
    if far:
        log_event("rows_beyond_model_range", logging.WARNING, rows=far,
                  limit_sds=MODEL_RANGE_SDS)


def _kept(frames: Iterable[Frame], into: list[tuple]):
    """The frames; their valid rows and validity added to ``into`` as they pass."""
    for frame in frames:
        into.append((_valid_rows(frame).copy(), frame.valid.copy()))
        yield frame


def _count_rows(extra: dict, segments: list[np.ndarray]) -> dict:
    """``extra`` with ``segments`` (rows' segment ids) added to its per-segment counts."""
    if not segments or not sum(len(s) for s in segments):
        return extra
    counts = dict(extra.get("segment_rows", {}))
    ids, n = np.unique(np.concatenate(segments), return_counts=True)
    for sid, k in zip(ids.tolist(), n.tolist()):
        counts[str(sid)] = counts.get(str(sid), 0) + int(k)
    return dict(extra, segment_rows=counts)


def _admit(frame: Frame, floor: int | None, mixture: Mixture | None) -> None:
    """Rows of ``frame`` with missing features but ``floor`` present made valid."""
    if floor is not None:
        admit(frame, floor, None if mixture is None else _model_range(mixture))


def _complete_only(X: np.ndarray, scores):
    """``scores`` with the rows of ``X`` that miss a feature at log-density +inf: their
    marginal densities are over fewer features, not comparable (never unexplained)."""
    gappy = observed_counts(X) < X.shape[1]
    if not gappy.any():
        return scores
    return replace(scores, log_density=np.where(gappy, np.inf, scores.log_density))


def _valid_rows(frame: Frame) -> np.ndarray:
    return frame.features if frame.n_invalid == 0 else frame.features[frame.valid]


def _scored_tables(frames: Iterable[Frame], mixture: Mixture | None, unusual: Unusual,
                   version: int):
    """Labels tables of ``frames`` scored by a fixed ``mixture`` (None: no model yet)."""
    for frame in frames:
        scores = mixture.score(_valid_rows(frame)) if mixture is not None else None
        yield _labels(frame, scores, unusual, version)


def _labels(frame: Frame, scores, unusual: Unusual, version: int | None) -> pa.Table:
    observed = frame_observed(frame)
    below = unusual.per_row(observed[frame.valid], frame.features.shape[1])
    return labels_table(frame.passthrough, frame.valid,
                        None if scores is None else scores.segment,
                        None if scores is None else scores.confidence,
                        None if scores is None else scores.log_density,
                        below, version, transforming.valid_log_jacobian(frame),
                        observed=observed)


def _rows_of(scores, start: int, stop: int):
    return type(scores)(**{name: getattr(scores, name)[start:stop]
                           for name in scores.__dataclass_fields__})


class _Run:
    """One input's frames learned in order: :meth:`tables` yields each frame's labels
    once its rows are scored; afterwards ``mixture``, ``extra``, the warm-up buffer
    changes and the row counts go to the commit.

    Frames wait (``held``) while there is no model yet, and until the first rows are
    scored, so that labels and the labels file's model version are those of the whole
    input. The unusual-row threshold moves once per scored step (one frame, or the
    frames up to the end of the warm-up), so an input of one frame is labelled as it
    always was; a larger input's later frames are labelled with the threshold that has
    followed its earlier ones.
    """

    def __init__(self, pipeline: Pipeline, extra: dict, version: int,
                 watch: InputWatch | None, life: LifeWatch | None):
        self.pipeline = pipeline
        self.mixture = pipeline.state.mixture
        self.extra = extra
        self.version = version
        self.watch, self.life = watch, life
        self.transforms = pipeline.state.transforms
        self.mapped_here = False       # transforms fixed in this input's warm-up
        self.rows = self.invalid = self.outside = 0
        self.scored = False            # some rows got scores (the labels' model version)
        self.warmup_keep: np.ndarray | None = None
        self.clear_warmup = False
        self.warmup_valid: np.ndarray | None = None   # which rows warmup_keep are
        self.first_unusual = Unusual(-np.inf)   # the thresholds when the first model is made
        self.held: list[Frame] = []
        self.held_scores: list = []     # scores of the held frames once made
        self.warm_up_tried = False
        self.said_waiting = False       # warned that too few rows are complete

    def tables(self, frames: Iterable[Frame]):
        floor = self.pipeline._floor()
        for frame in frames:
            if self.mapped_here:   # read in the data's units, before the first model
                transforming.map_frames([frame], self.transforms)
            _admit(frame, floor, self.mixture)
            if self.mixture is not None:
                _mark_beyond_model(frame, self.mixture)
            self.rows += frame.n_rows
            self.invalid += frame.n_invalid
            self.outside += frame.outside_domain
            self.held.append(frame)
            if self.mixture is None:
                self._warm_up()
            else:
                self._learn(frame)
            if self.scored or self.mixture is None:
                yield from self._release()
        if self.mixture is None:
            parts = [_valid_rows(f) for f in self.held]
            rows = np.concatenate(parts) if parts else None
            self.warmup_keep = rows if rows is not None and len(rows) else None
            if self.warmup_keep is not None:
                self.warmup_valid = np.concatenate([f.valid for f in self.held])
        self.held_scores += [None] * (len(self.held) - len(self.held_scores))
        yield from self._release(force=True)

    def _release(self, force: bool = False):
        """Labels of the held frames, if their scores are known (or the input ended)."""
        if not force and (self.mixture is None or not self.scored):
            return
        unusual = Unusual.from_extra(self.extra)
        version = self.version if self.scored else None
        for frame, scores in zip(self.held, self.held_scores):
            yield _labels(frame, scores, unusual, version)
        self.held, self.held_scores = [], []

    def _times(self, frames: list[Frame]):
        if self.watch is None:
            return
        times = [self.pipeline._times(f) for f in frames]
        if times[0] is None:
            self.watch.times = None
            return
        self.watch.times = np.concatenate([t.values for t in times])
        self.watch.times_unreadable += sum(t.unreadable for t in times)

    def _learn(self, frame: Frame) -> None:
        X = _valid_rows(frame)
        self._times([frame])
        self.mixture, scores = self.pipeline._learn_chunks(self.mixture, X, self.watch,
                                                           self.life)
        self.held_scores.append(scores)
        self._scored(scores, frame_observed(frame)[frame.valid])

    def _scored(self, scores, observed=None) -> None:
        if scores is None or not len(scores.log_density):
            return
        self.scored = True
        self.extra = self.pipeline._after_scoring(self.extra, scores, self.mixture, observed)

    def _warm_up(self) -> None:
        """Fit the first model once the buffer and the held frames hold enough rows (one
        try per input, as the rows it is fitted on are the first ``warmup_rows``)."""
        p = self.pipeline
        D = len(p.settings.features)
        buffered = 0 if p.state.warmup is None else \
            int(np.count_nonzero(observed_counts(p.state.warmup) == D))
        complete = buffered + sum(int(np.count_nonzero(frame_observed(f)[f.valid] == D))
                                  for f in self.held)
        if self.warm_up_tried or complete < p.settings.warmup_rows:
            if not self.said_waiting and complete < p.settings.warmup_rows <= \
                    (0 if p.state.warmup is None else len(p.state.warmup)) + \
                    sum(f.n_rows - f.n_invalid for f in self.held):
                self.said_waiting = True     # said once per input
                log_event("warmup_waiting_for_complete_rows", logging.WARNING,
                          complete_rows=complete, needed=p.settings.warmup_rows,
                          detail="the first model is fitted on rows with every feature "
                                 "present; rows with missing features wait for it")
            return
        self.warm_up_tried = True
        X = np.concatenate([_valid_rows(f) for f in self.held])
        self._times(self.held)
        buffered, fitted = None, self.transforms
        if fitted is not None and not fitted.identity:
            # the warm-up rows are in the data's units: the transforms (Yeo-Johnson
            # parameters fitted on these rows) are fixed here and kept with the model
            stored = p.state.warmup if p.state.warmup is not None else X[:0]
            fitted, buffered, X = transforming.fit_at_warm_up(
                fitted, stored, X, p.settings.warmup_rows)
        mixture, scores, _, init_extra = p._warm_up(X, self.watch, self.life, buffered)
        if mixture is None:
            return
        if fitted is not self.transforms:
            transforming.map_frames(self.held, fitted)
            self.transforms, self.mapped_here = fitted, True
            for part in (self.watch, self.life):
                if part is not None:
                    part.transforms = fitted
        self.mixture, self.clear_warmup = mixture, True
        self.extra.update(init_extra)
        self.first_unusual = Unusual.from_extra(init_extra)
        start = 0
        for f in self.held:
            n = f.n_rows - f.n_invalid
            self.held_scores.append(_rows_of(scores, start, start + n))
            start += n
        self._scored(scores, observed_counts(X))
