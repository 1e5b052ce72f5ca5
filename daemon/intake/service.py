"""The long-running service: watch the inbox and feed ready files to the pipeline.

One worker (the thread that calls :meth:`Service.run`) owns the pipeline and
the model; the observer thread only enqueues paths. Ready files are taken
oldest first (modification time, then name); when several are ready they are
taken as one group (:meth:`Pipeline.process_group`: committed in one
transaction), so a backlog drains with one commit per group instead of per
file, while a lone drop is committed on its own at once. A full listing at start-up and
every ``watch.rescan_seconds`` finds what events missed; the observer is
rebuilt if its thread dies. :meth:`Service.request_stop` (from a signal
handler) makes ``run`` return promptly, abandoning the file in progress.
"""
from __future__ import annotations

import heapq
import logging
import os
import queue
import sqlite3
import threading
import time
from pathlib import Path
from typing import Callable

from shoal.config import Settings
from shoal.daemon.errors import Interrupted
from shoal.daemon.intake.gate import ReadinessGate, Verdict
from shoal.daemon.files.layout import Layout
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.ingest.pipeline import Pipeline, Result
from shoal.daemon.intake.watcher import InboxWatcher, scan_inbox

__all__ = ["Service"]

_IDLE_WAIT = 0.5
# An input whose write or commit failed (disk full, I/O error) is tried again after
# this long, doubling per failure in a row up to _RETRY_MAX.
_RETRY_FIRST = 1.0
_RETRY_MAX = 60.0
# A group (inputs committed in one transaction) takes at most this many ready inputs
# and, past its first, this many input bytes: small drops share a commit, a large
# one goes on its own, and no input waits long for the ones before it.
_GROUP_INPUTS = 64
_GROUP_BYTES = 4 << 20


class Service:
    """The service loop: the inbox watcher's paths through the readiness gate into a
    queue ordered oldest first (modification time, then name), taken in groups by the
    pipeline on this thread; failures that belong to the machine (a full disk, an
    unwritable outbox) pause the intake and retry in order, and a periodic rescan finds
    what events missed. ``run`` returns when the stop event is set."""

    def __init__(self, settings: Settings, layout: Layout, pipeline: Pipeline, *,
                 observer_factory: Callable[[], object] | None = None,
                 clock: Callable[[], float] = time.monotonic,
                 on_result: Callable[[Result], None] | None = None):
        self.settings = settings
        self.layout = layout
        self.pipeline = pipeline
        self.stop_event = pipeline.stop
        self.clock = clock
        self.on_result = on_result
        w = settings.watch
        self.gate = ReadinessGate(w.settle_seconds, w.ignore,
                                  incomplete_seconds=w.incomplete_seconds, clock=clock)
        self.watcher = InboxWatcher(layout.inbox, w.queue_size, w.polling, w.poll_seconds,
                                    observer_factory=observer_factory, recursive=w.recursive)
        self._waiting: dict[str, float] = {}        # path -> monotonic time of next check
        # path -> (mtime_ns, path) of a waiting file that newer ones may not overtake
        self._holding: dict[str, tuple[int, str]] = {}
        self._ready: list[tuple[int, str]] = []     # heap of (mtime_ns, path)
        self._in_ready: set[str] = set()
        self._settled_out: dict[str, tuple] = {}    # path -> stat key of a file left behind
        self.counts: dict[str, int] = {}
        self._new_settings: Settings | None = None
        self._new_settings_note: Callable[[Settings], None] | None = None
        self._failures = 0                          # write/commit failures in a row
        self._retry_at: dict[str, float] = {}       # path -> monotonic time of its retry

    # -- control ---------------------------------------------------------------------
    def queued(self) -> int:
        """Paths known and not yet taken: ready, or waiting for the gate to look again."""
        return len(self._ready) + len(self._waiting)

    def request_stop(self) -> None:
        self.stop_event.set()
        try:
            self.watcher.events.put_nowait(("", False))  # wake the worker
        except queue.Full:
            pass

    def replace_settings(self, settings: Settings,
                         applied: Callable[[Settings], None] | None = None) -> None:
        """Use ``settings`` from the next turn of the loop, between inputs (any thread).

        The caller has checked that only reloadable settings changed
        (:mod:`shoal.daemon.runtime.reload`); ``applied`` is called on the worker once in use.
        """
        self._new_settings_note = applied
        self._new_settings = settings
        try:
            self.watcher.events.put_nowait(("", False))  # wake the worker
        except queue.Full:
            pass

    def _take_new_settings(self) -> None:
        settings, self._new_settings = self._new_settings, None
        self.settings = self.pipeline.settings = settings
        self.gate.settle = float(settings.watch.settle_seconds)
        self.gate.incomplete = max(float(settings.watch.incomplete_seconds), self.gate.settle)
        self.gate.ignore = tuple(settings.watch.ignore)
        if self._new_settings_note is not None:
            self._new_settings_note(settings)

    def run(self) -> None:
        """Serve until a stop is requested."""
        self.watcher.start()
        log_event("service_started", inbox=str(self.layout.inbox),
                  model_version=self.pipeline.state.version)
        next_rescan = 0.0
        try:
            while not self.stop_event.is_set():
                if self._new_settings is not None:
                    self._take_new_settings()
                if self.watcher.ensure_alive():
                    log_event("observer_rebuilt", logging.WARNING,
                              rebuilds=self.watcher.rebuilds)
                    next_rescan = 0.0
                now = self.clock()
                if now >= next_rescan or self.watcher.take_overflow():
                    self.rescan()
                    next_rescan = now + self.settings.watch.rescan_seconds
                self._drain_events(timeout=0.0)
                self._recheck_waiting()
                if self._ready and self._process_next():
                    continue
                due = min([next_rescan, *self._waiting.values()])
                self._drain_events(timeout=max(0.0, min(due - self.clock(), _IDLE_WAIT)))
        except Interrupted:
            pass
        finally:
            self.watcher.stop()
            log_event("service_stopped", model_version=self.pipeline.state.version)

    # -- discovery -------------------------------------------------------------------
    def rescan(self) -> None:
        try:
            paths = scan_inbox(self.layout.inbox, self.settings.watch.recursive,
                               self.gate.ignored)
        except OSError as exc:
            log_event("inbox_unreadable", logging.ERROR, detail=str(exc))
            return
        for path in paths:
            self._consider(path)

    def _drain_events(self, timeout: float) -> None:
        try:
            path, renamed = self.watcher.events.get(timeout=timeout) if timeout > 0 else \
                self.watcher.events.get_nowait()
        except queue.Empty:
            return
        while True:
            if path:
                if renamed:
                    self.gate.note_renamed(path)
                self._consider(path)
            try:
                path, renamed = self.watcher.events.get_nowait()
            except queue.Empty:
                return

    def _consider(self, path: str) -> None:
        if path in self._in_ready:
            return
        if self.settings.watch.recursive and self._in_sub_folder(path):
            return
        if self._retry_at.get(path, 0.0) > self.clock():  # failed: not before its retry
            self._waiting[path] = self._retry_at[path]
            return
        d = self.gate.check(path)
        if d.verdict is Verdict.READY:
            key = (d.size, d.mtime_ns, d.inode)
            self._unwait(path)
            if self._settled_out.get(path) == key:
                return  # kept in the inbox after commit (output.keep_inputs)
            heapq.heappush(self._ready, (d.mtime_ns, path))
            self._in_ready.add(path)
        elif d.verdict is Verdict.WAIT:
            self._wait(path, d)
        else:
            self._unwait(path)
            if d.verdict is Verdict.REFUSE and self._settled_out.get(path) != ("refused", d.inode):
                self._settled_out[path] = ("refused", d.inode)
                self._count("refused")
                log_event("input_refused", logging.WARNING, file=os.path.basename(path),
                          detail=d.reason)

    def _in_sub_folder(self, path: str) -> bool:
        """(``watch.recursive``) Whether ``path`` is not itself an input to consider: a
        sub-folder (its files are considered, now: one moved in whole brings no event
        for them), or an entry of a sub-folder whose name is ignored."""
        rel = os.path.relpath(path, self.layout.inbox)
        if any(self.gate.ignored(part) for part in rel.split(os.sep)[:-1]):
            return True
        if os.path.isdir(path) and not os.path.islink(path):
            if not self.gate.ignored(os.path.basename(path)):
                for inner in scan_inbox(Path(path), True, self.gate.ignored):
                    self._consider(inner)
            return True
        return False

    def _wait(self, path: str, d, at: float | None = None) -> None:
        """``path`` waits until ``at`` (``d.recheck_at``). Unless it only waits for its
        Parquet footer (its writer paused: its final modification time will be later),
        newer files wait behind it: the order stays oldest first however a file was found
        and whatever held it back (settling at start-up, a retry after a fault)."""
        self._waiting[path] = d.recheck_at if at is None else at
        if d.incomplete:
            self._holding.pop(path, None)
        else:
            self._holding[path] = (d.mtime_ns, path)

    def _unwait(self, path: str) -> None:
        self._waiting.pop(path, None)
        self._holding.pop(path, None)

    def _recheck_waiting(self) -> None:
        now = self.clock()
        for path, at in list(self._waiting.items()):
            if at <= now:
                del self._waiting[path]
                self._consider(path)

    # -- work ------------------------------------------------------------------------
    def _take_ready(self) -> tuple[str, object] | None:
        """The oldest ready path and its gate decision, or None if it is not ready now."""
        _, path = heapq.heappop(self._ready)
        self._in_ready.discard(path)
        d = self.gate.check(path)  # it may have changed or gone since it was queued
        if d.verdict is not Verdict.READY:
            if d.verdict is Verdict.WAIT:
                self._wait(path, d)
            else:
                self._retry_at.pop(path, None)
                self._unwait(path)
            return None
        if self._ready and (d.mtime_ns, path) > self._ready[0]:
            heapq.heappush(self._ready, (d.mtime_ns, path))  # touched: no longer the oldest
            self._in_ready.add(path)
            return None
        return path, d

    def _process_next(self) -> bool:
        """Take the ready inputs (oldest first, up to a group's bounds, none newer than a
        file still waiting) and process them as one group; nothing of a group is
        committed if a write or the commit fails. False if none could be taken."""
        group: list[tuple[str, object]] = []
        size = 0
        while self._ready and len(group) < _GROUP_INPUTS:
            if self._holding and self._ready[0] > min(self._holding.values()):
                break   # an older file is still waiting: nothing newer goes first
            taken = self._take_ready()
            if taken is None:
                continue
            path, d = taken
            if group and size + d.size > _GROUP_BYTES:
                heapq.heappush(self._ready, (d.mtime_ns, path))  # the next group's first
                self._in_ready.add(path)
                break
            group.append(taken)
            size += d.size
        if not group:
            return False
        try:
            results = self.pipeline.process_group([Path(p) for p, _ in group], in_inbox=True)
        except (OSError, sqlite3.Error) as exc:
            self._failed([(p, d) for p, d in group], exc)
            return True
        self._failures = 0
        for (path, d), result in zip(group, results):
            self._retry_at.pop(path, None)
            self._count(result.outcome)
            self.gate.forget(path)
            if result.outcome == "changed":   # a writer still at work: once it settles
                self._consider(path)
            elif os.path.lexists(path):
                self._settled_out[path] = (d.size, d.mtime_ns, d.inode)
            else:
                self._settled_out.pop(path, None)
            if self.on_result is not None:
                self.on_result(result)
        for path, _ in group[len(results):]:  # left by a stop request: not taken
            self.gate.forget(path)
        return True

    def _failed(self, group: list[tuple[str, object]], exc: BaseException) -> None:
        """Opening, writing or committing a group failed (ENOSPC, EIO, EMFILE, EACCES ...):
        nothing of its uncommitted inputs was kept. Reload the model from the store, leave
        the inputs in the inbox and try them again later, in the same order, before
        anything newer."""
        paths = [p for p, _ in group]
        self._failures += 1
        wait = min(_RETRY_FIRST * 2 ** (self._failures - 1), _RETRY_MAX)
        self._count("failed")
        log_event("input_failed", logging.ERROR, file=os.path.basename(paths[-1]),
                  inputs=len(paths), detail=f"{type(exc).__name__}: {exc}",
                  retry_seconds=wait, failures_in_a_row=self._failures)
        try:
            self.pipeline.state = self.pipeline.load_state()
        except (OSError, sqlite3.Error) as again:
            log_event("state_reload_failed", logging.ERROR, detail=str(again))
        at = self.clock() + wait
        for path, d in group:
            self._retry_at[path] = at
            self._wait(path, d, at)

    def _count(self, outcome: str) -> None:
        self.counts[outcome] = self.counts.get(outcome, 0) + 1
