"""Commit: inputs made durable in ONE state-store transaction, then moved out.

An input's :class:`InputCommit` (ledger row, checkpoint, segment history, alerts)
is committed alone or with the other inputs of its group (:class:`Group`: one
transaction, one fsync of the outbox folder covering every labels file's rename,
only the last checkpoint stored). What follows a commit (log lines, waking the
alert sender, :func:`move_to_processed`) runs only once the commit is durable. A
re-baseline request with no input to carry it is committed on its own
(:func:`rebaseline_committed`).
"""
from __future__ import annotations

import contextlib
import logging
import os
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING, Callable

from shoal.config import Settings
from shoal.daemon.errors import StateError
from shoal.daemon.files.layout import Layout
from shoal.daemon.files.moving import move_out
from shoal.daemon.files.writer import display_name, fsync_dir
from shoal.daemon.ingest.results import ModelState, Result, log_result
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.segments.segment_names import name_alerts, segment_names
from shoal.daemon.state.store import InputCommit, LedgerEntry, StateStore

if TYPE_CHECKING:
    from shoal.daemon.segments.monitor import DriftMonitor

__all__ = ["MoveOut", "Pending", "Group", "commit_one", "move_to_processed",
           "rebaseline_committed"]


@dataclass(frozen=True)
class MoveOut:
    """The input to move to ``processed/`` once committed: its path, whether it is in
    the inbox (else it stays where it is), and the file as it was read (``pin``)."""

    path: Path
    in_inbox: bool
    pin: os.stat_result


@dataclass
class Pending:
    """An input of the open group: processed, its labels written, its commit not yet made."""

    commit: InputCommit
    result: Result
    version: int                        # the model version after it
    duration: float                     # seconds its processing took
    announce: Callable[[], None] | None = None   # its alerts and events, once committed
    move: MoveOut | None = None


class Group:
    """The inputs processed since the group was opened whose commits wait for its end:
    committed together by :meth:`flush`, in the order they were taken."""

    def __init__(self):
        self.pending: list[Pending] = []

    def __bool__(self) -> bool:
        return bool(self.pending)

    def entries(self, digest: str | None = None) -> list[LedgerEntry]:
        """The ledger rows of the pending inputs (with this content digest)."""
        return [p.commit.entry for p in self.pending
                if digest is None or p.commit.entry.digest == digest]

    def applies(self, rebaseline: int) -> bool:
        """Whether a pending input applies this re-baseline request."""
        return any(p.commit.rebaseline == rebaseline for p in self.pending)

    def add(self, pending: Pending) -> None:
        """Queue ``pending``; a checkpoint it carries makes those before it needless."""
        if pending.commit.checkpoint is not None:
            for p in self.pending:
                if p.commit.checkpoint is not None:
                    p.commit = replace(p.commit, checkpoint=None)
        self.pending.append(pending)

    def flush(self, store: StateStore, settings: Settings, layout: Layout) -> None:
        """Commit the pending inputs in ONE transaction, then finish each: its result
        logged, its alerts announced, the input moved to ``processed/``."""
        pending, self.pending = self.pending, []
        if not pending:
            return
        if any(p.result.labels is not None for p in pending):
            fsync_dir(layout.outbox)  # the labels files' renames, before the commit
        versions = store.commit_inputs([p.commit for p in pending])
        if versions != [p.version for p in pending]:
            raise StateError(f"the state store's model versions {versions} are not the "
                             f"ones the group was learned as {[p.version for p in pending]}")
        for p in pending:
            log_result(p.result, p.duration)
            finish(settings, layout, p.announce, p.move)


def commit_one(store: StateStore, settings: Settings, layout: Layout, commit: InputCommit,
               version: int, announce: Callable[[], None] | None,
               move: MoveOut | None) -> None:
    """Commit one input now, then finish it (:func:`finish`)."""
    committed = store.commit_inputs([commit])[0]
    if committed != version:
        raise StateError(f"the state store's model version {committed} is not the "
                         f"version {version} the input was learned as")
    finish(settings, layout, announce, move)


def finish(settings: Settings, layout: Layout, announce: Callable[[], None] | None,
           move: MoveOut | None) -> None:
    """After an input's commit is durable: its alerts and events said, then the input
    moved to ``processed/``."""
    if announce is not None:
        announce()
    if move is not None:
        move_to_processed(settings, layout, move)


def move_to_processed(settings: Settings, layout: Layout, move: MoveOut) -> None:
    """Move the committed input read (``pin``: by device and inode, not by name) from
    the inbox to ``processed/``; a file renamed over it meanwhile is a new input and
    stays."""
    path, pin = move.path, move.pin
    if not move.in_inbox or settings.output.keep_inputs:
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
    if move_out(path, layout.processed, identity=(pin.st_dev, pin.st_ino)) is None \
            and os.path.lexists(path):
        log_event("input_replaced", logging.INFO, file=display_name(path.name),
                  detail="another file took its name while it was processed; that file "
                         "is a new input")


def rebaseline_committed(monitor: DriftMonitor, store: StateStore, state: ModelState,
                         request_id: int, note: str, listeners: list
                         ) -> tuple[ModelState, list[tuple[str, dict]]]:
    """Apply re-baseline request ``request_id`` to the latest checkpoint (``state``) and
    commit it; returns the state after it and the alerts it raised (``listeners`` hear
    of them once committed)."""
    st = state
    if st.mixture is None:
        raise StateError("no model yet: the warm-up has not finished, so there is "
                         "nothing to take as the baseline")
    watch = monitor.begin(st.extra.get("drift"), version=st.version, file="",
                          unusual_below=st.extra.get("unusual_below"))
    if watch is None:
        raise StateError("drift watching is off (drift.enabled: false)")
    watch.transforms = st.transforms
    watch.rebaseline(st.mixture, note)
    extra = dict(st.extra, drift=watch.state)
    store.apply_rebaseline(request_id, st.version, extra,
                           name_alerts(watch.alerts, segment_names(store.db)))
    after = replace(st, extra=extra)
    log_event("drift_rebaselined", model_version=st.version, note=note)
    watch.log_alerts(st.version)
    if watch.alerts:
        for listener in listeners:
            listener(st.version)
    return after, watch.alerts
