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
import logging
import os
import stat as stat_mod
import threading
import time
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any, BinaryIO, Callable, Iterable

import numpy as np
import pyarrow as pa

from shoal.config import Settings
from shoal.core import (
    Mixture,
    ModelError,
    NotEnoughDataError,
    StepSchedule,
    initialise,
    select_n_components,
)
from shoal.core import fused
from shoal.daemon.digest import digest_file
from shoal.daemon.errors import (
    InputRefused,
    InputRejected,
    InputVanished,
    Interrupted,
    StateError,
)
from shoal.daemon.gate import input_kind
from shoal.daemon.layout import Layout
from shoal.daemon.logs import log_event
from shoal.daemon.quarantine import move_out, quarantine
from shoal.daemon.readers import Frame, file_digest, iter_frames, prefetch
from shoal.daemon.store import Checkpoint, HistoryRow, InputCommit, LedgerEntry, StateStore
from shoal.daemon.writer import fsync_dir, labels_name, labels_table, write_labels_stream

if TYPE_CHECKING:
    from shoal.daemon.monitor import DriftMonitor, InputWatch
    from shoal.daemon.segment_life import LifeWatch

__all__ = ["Pipeline", "Result", "ModelState", "open_input"]

# A learned input moves the unusual-row threshold this far towards its own quantile:
# weight n / (n + _UNUSUAL_MEMORY_ROWS), i.e. the threshold follows roughly the last
# _UNUSUAL_MEMORY_ROWS rows.
_UNUSUAL_MEMORY_ROWS = 50_000
# Inputs from this size on are hashed, read, learned and written by overlapping threads;
# smaller ones in the worker's thread (starting a thread can take a few ms: a switch
# interval of the interpreter lock).
_THREADED_BYTES = 8 << 20


@dataclass
class Result:
    outcome: str          # committed | duplicate | already_done | quarantined | vanished | refused
    name: str
    rows: int = 0
    rows_invalid: int = 0
    labels: Path | None = None
    reason: str | None = None
    detail: str | None = None
    model_version: int | None = None


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


def open_input(path: Path) -> BinaryIO:
    """Open a regular file for reading without following links or blocking on FIFOs."""
    flags = os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | os.O_CLOEXEC
    try:
        fd = os.open(path, flags)
    except FileNotFoundError as exc:
        raise InputVanished(f"{path.name} no longer exists") from exc
    except OSError as exc:  # ELOOP: a symlink; ENXIO: a socket
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
        # the compiled scoring kernels checked once (milliseconds) at start-up rather
        # than failing inside the first input
        fused.warm()
        if settings.drift.enabled or settings.lifecycle.enabled:
            # loaded now (with scipy.special and scipy.linalg, ~0.2-0.6 s) rather than
            # inside the first input's processing time
            import shoal.daemon.monitor  # noqa: F401
            import shoal.daemon.segment_life  # noqa: F401

    @property
    def monitor(self) -> DriftMonitor:
        """Drift evaluation with the settings in force (they may be reloaded)."""
        from shoal.daemon.monitor import DriftMonitor

        return DriftMonitor(self.settings)

    # -- state ---------------------------------------------------------------------
    def load_state(self) -> ModelState:
        version = self.store.model_version
        cp = self.store.latest_checkpoint()
        if cp is None:
            return ModelState(version=version, warmup=self.store.warmup_rows())
        if cp.version != version:
            raise StateError(f"state store's latest checkpoint is version {cp.version} but "
                             f"the model version is {version}")
        try:
            mixture = Mixture.from_state(cp.arrays, cp.meta)
        except ModelError as exc:
            raise StateError(f"checkpoint {cp.version} cannot be loaded: {exc}") from exc
        if mixture.n_features != len(self.settings.features):
            raise StateError(f"the stored model has {mixture.n_features} features but the "
                             f"config lists {len(self.settings.features)}; use a new state "
                             "folder for a different feature set")
        return ModelState(version=version, mixture=mixture, extra=cp.extra)

    def _check_stop(self) -> None:
        if self.stop.is_set():
            raise Interrupted("stop requested")

    # -- one input -----------------------------------------------------------------
    def process(self, path: Path, *, in_inbox: bool = True) -> Result:
        path = Path(path)
        t0 = self.monotonic()
        seen_at = self.wall()
        name = path.name
        log_event("input_started", logging.DEBUG, file=name, model_version=self.state.version)
        try:
            result = self._process(path, name, in_inbox, seen_at)
        except InputVanished as exc:
            log_event("input_vanished", logging.WARNING, file=name, detail=str(exc))
            return Result("vanished", name, detail=str(exc))
        except InputRefused as exc:
            log_event("input_refused", logging.WARNING, file=name, detail=str(exc))
            return Result("refused", name, detail=str(exc))
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
        """
        if self._group is not None:
            raise RuntimeError("process_group called inside a group")
        self._group = []
        results: list[Result] = []
        try:
            for path in paths:
                self._check_stop()
                results.append(self.process(path, in_inbox=in_inbox))
        except Interrupted:
            pass  # the inputs done so far are committed below
        except BaseException:
            self._group = None
            raise
        try:
            self._flush()
        finally:
            self._group = None
        return results

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
            size = os.fstat(f.fileno()).st_size
            if size == 0:
                raise InputRejected("empty", "the input is empty (0 bytes)", size=0)
            if size > limits.max_file_bytes:
                raise InputRejected("too_large", f"{size} bytes, more than "
                                    f"limits.max_file_bytes={limits.max_file_bytes}", size=size)
            if kind is None:
                raise InputRejected("unsupported_type", "expected a name ending in .csv, "
                                    ".csv.gz, .parquet or .pq", size=size)
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

                try:
                    try:
                        result = self._learn(self._frames(f, kind, threaded), entry, claim,
                                             hashing.ready)
                    except _Seen as seen:
                        if any(e.name == name for e in seen.done):
                            if self._group:
                                self._flush()  # moved only once its ledger row is committed
                            self._finish(path, in_inbox)
                            return Result("already_done", name,
                                          model_version=self.state.version)
                        f.seek(0)
                        result = self._duplicate(self._frames(f, kind, threaded),
                                                 _with(entry, digest=seen.digest))
                except InputRejected as exc:
                    with contextlib.suppress(OSError, RuntimeError):
                        exc.facts.setdefault("digest", hashing.result())
                        exc.facts.setdefault("digest_algorithm", algorithm)
                    exc.facts.setdefault("size", size)
                    raise
        finish = lambda: self._finish(path, in_inbox)  # noqa: E731
        if self._group:
            self._group[-1].after.append(finish)  # after the group's commit
        else:
            finish()
        return result

    def _frames(self, f: BinaryIO, kind: str, threaded: bool) -> prefetch:
        """The input's frames, read in a thread a few frames ahead of the model; with a
        model, checked against its range as they are read (:func:`_mark_beyond_model`)."""
        mixture = self.state.mixture
        return prefetch(iter_frames(f, kind, self.settings, self.stop.is_set,
                                    model_range=None if mixture is None
                                    else _model_range(mixture)),
                        threaded=threaded)

    def _write(self, frames: prefetch, tables: Callable[[Iterable[Frame]], Iterable[pa.Table]],
               entry: LedgerEntry, version: Callable[[], int | None],
               claim: Callable[[], str] | None = None,
               ready: Callable[[], bool] | None = None) -> tuple[Path, str]:
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
            return _labels_metadata(digest[0], algorithm, entry.name, version())

        def checked(frames):
            for table in tables(frames):
                self._check_stop()
                yield table
        # named after a placeholder digest until the digest is known
        target = self.layout.outbox / labels_name(entry.name, entry.digest or "0" * 16, fmt)
        with frames:
            path = write_labels_stream(
                checked(frames), target, fmt, metadata,
                sync_folder=self._group is None,  # a group syncs it once
                final=lambda: self.layout.outbox / labels_name(entry.name, digest[0], fmt),
                threaded=frames.threaded, ready=ready)
        return path, digest[0]

    def _duplicate(self, frames: prefetch, entry: LedgerEntry) -> Result:
        """Same content under another name: labels written, the model not updated."""
        st = self.state
        count = _Count()

        def tables(frames):
            return _scored_tables(count.counted(frames, st.mixture), st.mixture,
                                  st.extra.get("unusual_below", -np.inf), st.version)
        labels, _ = self._write(frames, tables, entry, lambda: st.version)
        entry = _with(entry, outcome="duplicate", labels=labels.name, rows=count.rows,
                      rows_invalid=count.invalid)
        result = Result("duplicate", entry.name, count.rows, count.invalid, labels,
                        model_version=st.version)
        self._commit(InputCommit(entry, learned=False), st.version, result)
        return result

    def _learn(self, frames: prefetch, entry: LedgerEntry, claim: Callable[[], str],
               ready: Callable[[], bool] | None = None) -> Result:
        st = self.state
        version = st.version + 1
        extra = dict(st.extra)
        watch = None
        if self.settings.drift.enabled:
            watch = self.monitor.begin(extra.get("drift"), version=version, file=entry.name,
                                       unusual_below=extra.get("unusual_below"))
        life = self._life(extra.get("lifecycle"), version, entry.name)
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
                                     lambda: version if run.scored else None, claim, ready)
        mixture, extra = run.mixture, run.extra
        warmup_keep, clear_warmup = run.warmup_keep, run.clear_warmup
        if mixture is not None:
            extra = self._born(extra, mixture, version)
        if watch is not None and watch.state is not None:
            extra["drift"] = watch.state
        if life is not None and mixture is not None:
            extra["lifecycle"] = life.final_state()
        checkpoint = history = None
        if mixture is not None:
            arrays, meta = mixture.to_state()
            checkpoint = Checkpoint(version, arrays, meta, extra)
            history = _history(mixture, extra,
                               watch.segment_drift() if watch is not None else None)
            if life is not None:
                history = life.history(history)
        entry = _with(entry, digest=digest, labels=labels.name, rows=run.rows,
                      rows_invalid=run.invalid)
        self._check_stop()
        alerts = (watch.alerts if watch is not None else []) + \
            (life.alerts if life is not None else [])
        applied = rebaseline is not None and watch.rebaselined
        commit = InputCommit(entry, learned=True, checkpoint=checkpoint,
                             warmup_rows=warmup_keep, clear_warmup=clear_warmup,
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
                        model_version=version)
        self._commit(commit, version, result, after)
        buffered = None
        if mixture is None:
            parts = [a for a in (st.warmup, warmup_keep) if a is not None and len(a)]
            buffered = np.concatenate(parts) if parts else None
        self.state = ModelState(version, mixture, extra, buffered)
        return result

    def _times(self, frame: Frame):
        """The time column of the valid rows (``drift.time_column``), or None."""
        name = self.settings.drift.time_column
        if name is None or name not in frame.passthrough.column_names:
            return None
        column = frame.passthrough.column(name).to_numpy(zero_copy_only=False)
        return column[frame.valid]

    def rebaseline_now(self, request_id: int, note: str) -> list[tuple[str, dict]]:
        """Apply a re-baseline request to the latest checkpoint (no input needed)."""
        st = self.state
        if st.mixture is None:
            raise StateError("no model yet: the warm-up has not finished, so there is "
                             "nothing to take as the reference")
        watch = self.monitor.begin(st.extra.get("drift"), version=st.version, file="",
                                   unusual_below=st.extra.get("unusual_below"))
        if watch is None:
            raise StateError("drift watching is off (drift.enabled: false)")
        watch.rebaseline(st.mixture, note)
        extra = dict(st.extra, drift=watch.state)
        self.store.apply_rebaseline(request_id, st.version, extra, watch.alerts)
        self.state = ModelState(st.version, st.mixture, extra, st.warmup)
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

    def _life(self, state: dict | None, version: int, file: str) -> LifeWatch | None:
        """Births, retirements and merges for one input (None when switched off)."""
        if not self.settings.lifecycle.enabled:
            return None
        from shoal.daemon.segment_life import LifeWatch

        return LifeWatch(self.settings, state, version=version, file=file)

    def _warm_up(self, X: np.ndarray, watch: InputWatch | None = None,
                 life: LifeWatch | None = None):
        """Buffer rows until ``warmup_rows``; then fit the first model.

        Returns ``(mixture or None, scores or None, rows to add to the buffer,
        checkpoint extras of the new model)``.
        """
        s = self.settings
        buffered = self.state.warmup if self.state.warmup is not None else np.empty((0, X.shape[1]))
        if len(buffered) + len(X) < s.warmup_rows:
            return None, None, X, {}
        need = max(s.warmup_rows - len(buffered), 0)
        Xw = np.concatenate([buffered, X[:need]])
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
        extra = {"unusual_below": float(np.quantile(mixture.score(Xw).log_density,
                                                     s.output.unusual_quantile))}
        if watch is not None:
            watch.start(stream_offset=len(Xw))
            watch.unusual_below = extra["unusual_below"]
            if watch.times is not None:
                watch.times = watch.times[need:]
        if life is not None:
            life.start(stream_offset=len(Xw))
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
                    life.observe(before, piece, scores)
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

    def _after_scoring(self, extra: dict, scores, mixture: Mixture) -> dict:
        extra = dict(extra)
        counts = dict(extra.get("segment_rows", {}))
        ids, n = np.unique(scores.segment, return_counts=True)
        for sid, k in zip(ids.tolist(), n.tolist()):
            counts[str(sid)] = counts.get(str(sid), 0) + int(k)
        extra["segment_rows"] = counts
        q = self.settings.output.unusual_quantile
        if len(scores.log_density) and "unusual_below" in extra:
            w = len(scores.log_density) / (len(scores.log_density) + _UNUSUAL_MEMORY_ROWS)
            here = linear_quantile(scores.log_density, q)
            extra["unusual_below"] = float(extra["unusual_below"] +
                                           w * (here - extra["unusual_below"]))
        return extra

    # -- endings -------------------------------------------------------------------
    def _finish(self, path: Path, in_inbox: bool) -> None:
        if not in_inbox or self.settings.output.keep_inputs:
            return
        move_out(path, self.layout.processed)

    def _quarantine(self, path: Path, name: str, in_inbox: bool, exc: InputRejected,
                    seen_at: float, t0: float) -> Result:
        if self._group:
            self._flush()  # the inputs before it first: the ledger keeps their order
        now = self.wall()
        facts = {k: v for k, v in exc.facts.items()}
        sidecar = quarantine(path, self.layout.quarantine, exc.reason, exc.detail,
                             move=in_inbox, now=now, facts=facts)
        self.store.record_quarantine(LedgerEntry(
            digest=facts.get("digest"), name=name, size=int(facts.get("size", 0) or 0),
            outcome="quarantined", reason=f"{exc.reason}: {exc.detail}", seen_at=seen_at,
            finished_at=now))
        log_event("input_quarantined", logging.WARNING, file=name, reason=exc.reason,
                  detail=exc.detail, sidecar=sidecar.name,
                  duration=round(self.monotonic() - t0, 4))
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
                                ".parquet or .pq")
        fmt = "csv" if out.name.lower().endswith(".csv") else "parquet"
        count = _Count()
        algorithm = self.store.digest_algorithm
        with open_input(path) as f:
            digest = digest_file(f, algorithm)
            with self._frames(f, kind, os.fstat(f.fileno()).st_size >= _THREADED_BYTES) \
                    as frames:
                tables = _scored_tables(count.counted(frames, st.mixture), st.mixture,
                                        st.extra.get("unusual_below", -np.inf), st.version)
                write_labels_stream(tables, out, fmt, lambda: _labels_metadata(
                    digest, algorithm, path.name, st.version), threaded=frames.threaded)
        return Result("labelled", path.name, count.rows, count.invalid, out,
                      model_version=st.version)


def _log_result(result: Result, duration: float) -> None:
    log_event(f"input_{result.outcome}", logging.INFO, file=result.name, rows=result.rows,
              rows_invalid=result.rows_invalid or None,
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


def _labels_metadata(digest: str, algorithm: str, name: str, version: int | None) -> dict:
    """The ``shoal.*`` keys of a labels file's metadata."""
    return {"input_digest": digest, "digest_algorithm": algorithm, "input_name": name,
            "model_version": version}


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


def _history(mixture: Mixture, extra: dict, drift: dict | None = None) -> list[HistoryRow]:
    means = mixture.data_means()
    stds = mixture.data_stds()
    counts = extra.get("segment_rows", {})
    drift = drift or {}
    return [HistoryRow(segment=int(sid), weight=float(mixture.weights[k]),
                       rows=int(counts.get(str(int(sid)), 0)), mean=means[k].tolist(),
                       spread=stds[k].tolist(), drift=drift.get(str(int(sid))))
            for k, sid in enumerate(mixture.ids.tolist())]


# -- the read -> score -> learn -> labels loop -----------------------------------------
class _Seen(Exception):
    """The ledger (or the open group) already has an input of this content."""

    def __init__(self, digest: str, done: list[LedgerEntry]):
        super().__init__(digest)
        self.digest, self.done = digest, done


class _Count:
    """Rows and rows without a segment of the frames that went through ``counted``."""

    def __init__(self):
        self.rows = self.invalid = 0

    def counted(self, frames: Iterable[Frame], mixture: Mixture | None = None):
        """The frames, counted; with a model, rows beyond its range marked invalid first
        (as when they are learned, so a duplicate's labels equal the original's)."""
        for frame in frames:
            if mixture is not None:
                _mark_beyond_model(frame, mixture)
            self.rows += frame.n_rows
            self.invalid += frame.n_invalid
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


def _valid_rows(frame: Frame) -> np.ndarray:
    return frame.features if frame.n_invalid == 0 else frame.features[frame.valid]


def _scored_tables(frames: Iterable[Frame], mixture: Mixture | None, unusual_below: float,
                   version: int):
    """Labels tables of ``frames`` scored by a fixed ``mixture`` (None: no model yet)."""
    for frame in frames:
        scores = mixture.score(_valid_rows(frame)) if mixture is not None else None
        yield _labels(frame, scores, unusual_below, version)


def _labels(frame: Frame, scores, unusual_below: float, version: int | None) -> pa.Table:
    return labels_table(frame.passthrough, frame.valid,
                        None if scores is None else scores.segment,
                        None if scores is None else scores.confidence,
                        None if scores is None else scores.log_density,
                        unusual_below, version)


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
        self.rows = self.invalid = 0
        self.scored = False            # some rows got scores (the labels' model version)
        self.warmup_keep: np.ndarray | None = None
        self.clear_warmup = False
        self.held: list[Frame] = []
        self.held_scores: list = []     # scores of the held frames once made
        self.warm_up_tried = False

    def tables(self, frames: Iterable[Frame]):
        for frame in frames:
            if self.mixture is not None:
                _mark_beyond_model(frame, self.mixture)
            self.rows += frame.n_rows
            self.invalid += frame.n_invalid
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
        self.held_scores += [None] * (len(self.held) - len(self.held_scores))
        yield from self._release(force=True)

    def _release(self, force: bool = False):
        """Labels of the held frames, if their scores are known (or the input ended)."""
        if not force and (self.mixture is None or not self.scored):
            return
        unusual_below = self.extra.get("unusual_below", -np.inf)
        version = self.version if self.scored else None
        for frame, scores in zip(self.held, self.held_scores):
            yield _labels(frame, scores, unusual_below, version)
        self.held, self.held_scores = [], []

    def _times(self, frames: list[Frame]):
        if self.watch is None:
            return
        times = [self.pipeline._times(f) for f in frames]
        self.watch.times = None if times[0] is None else np.concatenate(times)

    def _learn(self, frame: Frame) -> None:
        X = _valid_rows(frame)
        self._times([frame])
        self.mixture, scores = self.pipeline._learn_chunks(self.mixture, X, self.watch,
                                                           self.life)
        self.held_scores.append(scores)
        self._scored(scores)

    def _scored(self, scores) -> None:
        if scores is None or not len(scores.log_density):
            return
        self.scored = True
        self.extra = self.pipeline._after_scoring(self.extra, scores, self.mixture)

    def _warm_up(self) -> None:
        """Fit the first model once the buffer and the held frames hold enough rows (one
        try per input, as the rows it is fitted on are the first ``warmup_rows``)."""
        p = self.pipeline
        buffered = 0 if p.state.warmup is None else len(p.state.warmup)
        if self.warm_up_tried or \
                buffered + sum(f.n_rows - f.n_invalid for f in self.held) < p.settings.warmup_rows:
            return
        self.warm_up_tried = True
        X = np.concatenate([_valid_rows(f) for f in self.held])
        self._times(self.held)
        mixture, scores, _, init_extra = p._warm_up(X, self.watch, self.life)
        if mixture is None:
            return
        self.mixture, self.clear_warmup = mixture, True
        self.extra.update(init_extra)
        start = 0
        for f in self.held:
            n = f.n_rows - f.n_invalid
            self.held_scores.append(_rows_of(scores, start, start + n))
            start += n
        self._scored(scores)
