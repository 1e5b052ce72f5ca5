"""Retention: what is cleaned up (``retention`` in the config), and ``shoal prune``.

A :class:`Plan` lists everything one pass would remove: committed inputs in
``processed/`` (by age, then by total size), quarantined inputs with their
sidecars, alerts files rotated out, and state rows past ``history_days``
(ledger rows, segment history thinned to one model version a UTC day, delivered
notifications of closed alerts). :func:`make_plan` only reads; :func:`apply_plan`
removes exactly what the plan lists, so ``shoal prune --dry-run`` shows what
``shoal prune`` then does. The running service makes and applies a plan between
inputs, at most every ``retention.check_seconds`` (:class:`RetentionKeeper`).

What is never removed, whatever the settings:
- the ledger row of an input still in the inbox (by name): a file that is there may
  be offered again and must be recognised by its digest (exactly-once); the
  ledger rows behind a warm-up still under way; the rows of the model versions the
  thinned history keeps (the report places them on its axis);
- alert notifications not yet delivered to every sink, and the notification of an
  alert still open (raised and not cleared);
- lifecycle events in the segment history, checkpoints (``learning.checkpoints_kept``
  governs those), labels files (they are the service's output).

Ledger totals removed with their rows are added to the meta key
``compacted_ledger``, and removed notifications to ``compacted_notifications``, so
that ``status`` and the metrics' counters keep counting them.
"""
from __future__ import annotations

import datetime as _dt
import json
import logging
import os
import sqlite3
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

from shoal.config import Settings
from shoal.daemon.state.compacted import (
    COMPACTED_KEY,
    COMPACTED_NOTIFICATIONS_KEY,
    add_ledger_totals,
    compacted_notifications,
    compacted_totals,
)
from shoal.daemon.files.layout import Layout
from shoal.daemon.runtime.logs import log_event

__all__ = ["Plan", "make_plan", "apply_plan", "RetentionKeeper", "compacted_totals",
           "compacted_notifications", "COMPACTED_KEY", "COMPACTED_NOTIFICATIONS_KEY",
           "add_prune_command"]

_DAY = 86400.0
_OPEN_STATUSES = ("raised", "raised")


@dataclass
class Plan:
    """What one retention pass removes. Files are absolute paths; rows are keys."""
    files: list[tuple[str, Path, int]] = field(default_factory=list)   # (why, path, bytes)
    rotations: list[tuple[Path, Path]] = field(default_factory=list)   # renames, in order
    ledger_ids: list[int] = field(default_factory=list)
    history_versions: list[int] = field(default_factory=list)
    notification_ids: list[str] = field(default_factory=list)

    def empty(self) -> bool:
        return not (self.files or self.rotations or self.ledger_ids or self.history_versions
                    or self.notification_ids)

    def lines(self) -> list[str]:
        """One line per file and per kind of state row, in the order they are removed."""
        out = [f"delete {why} {path} ({size} bytes)" for why, path, size in self.files]
        out += [f"rotate {a} -> {b}" for a, b in self.rotations]
        if self.ledger_ids:
            out.append(f"remove {len(self.ledger_ids)} ledger rows (ids "
                       f"{_ranges(self.ledger_ids)})")
        if self.history_versions:
            out.append(f"remove the segment history of {len(self.history_versions)} model "
                       f"versions ({_ranges(self.history_versions)})")
        if self.notification_ids:
            out.append(f"remove {len(self.notification_ids)} delivered notifications of "
                       "closed alerts: " + ", ".join(self.notification_ids))
        return out


def _ranges(numbers: list[int]) -> str:
    """1,2,3,7,8 -> '1-3, 7-8'."""
    out, start, prev = [], None, None
    for n in sorted(numbers):
        if start is None:
            start = prev = n
        elif n == prev + 1:
            prev = n
        else:
            out.append(f"{start}-{prev}" if prev != start else f"{start}")
            start = prev = n
    if start is not None:
        out.append(f"{start}-{prev}" if prev != start else f"{start}")
    return ", ".join(out)


# -- files ------------------------------------------------------------------------------
def _regular_files(folder: Path):
    try:
        entries = list(os.scandir(folder))
    except FileNotFoundError:
        return
    for e in entries:
        if e.name.startswith(".") or not e.is_file(follow_symlinks=False):
            continue
        yield Path(e.path), e.stat(follow_symlinks=False)


def _processed(plan: Plan, settings: Settings, layout: Layout, now: float) -> None:
    r = settings.retention
    if r.processed_days is None and r.processed_bytes is None:
        return
    # ctime: when the file was linked (moved) into processed/; its mtime is the drop's.
    files = sorted(_regular_files(layout.processed), key=lambda f: (-f[1].st_ctime, f[0].name))
    cutoff = None if r.processed_days is None else now - r.processed_days * _DAY
    total = 0
    for path, st in files:   # newest first
        total += st.st_size
        too_old = cutoff is not None and st.st_ctime <= cutoff
        too_much = r.processed_bytes is not None and total > r.processed_bytes
        if too_old or too_much:
            plan.files.append(("processed input", path, st.st_size))
    plan.files.reverse()     # oldest first


def _sidecar_time(path: Path, fallback: float, key: str = "time") -> float:
    try:
        record = json.loads(path.read_text("utf-8"))
        when = _dt.datetime.fromisoformat(str(record[key]))
    except (OSError, ValueError, KeyError, TypeError):
        return fallback
    if when.tzinfo is None:
        when = when.replace(tzinfo=_dt.timezone.utc)
    return when.timestamp()


def _quarantine(plan: Plan, settings: Settings, layout: Layout, now: float) -> None:
    days = settings.retention.quarantine_days
    if days is None:
        return
    cutoff = now - days * _DAY
    files = dict(_regular_files(layout.quarantine))
    for path, st in sorted(files.items()):
        if path.suffix != ".json":
            continue
        if _sidecar_time(path, st.st_ctime) > cutoff:
            continue
        data = path.with_name(path.name[:-len(".json")])
        if data in files:
            plan.files.append(("quarantined input", data, files[data].st_size))
        plan.files.append(("quarantine sidecar", path, st.st_size))
    for path, st in sorted(_regular_files(layout.quarantine / "retried")):
        if path.suffix == ".json" and _sidecar_time(path, st.st_ctime, "retried_at") <= cutoff:
            plan.files.append(("retried quarantine sidecar", path, st.st_size))
    sidecars = {p.name[:-len(".json")] for p in files if p.suffix == ".json"}
    for path, st in sorted(files.items()):   # inputs whose sidecar is gone
        if path.suffix != ".json" and path.name not in sidecars and st.st_ctime <= cutoff:
            plan.files.append(("quarantined input", path, st.st_size))


def _alerts_file(plan: Plan, settings: Settings) -> None:
    r = settings.retention
    path = settings.alerts.file
    if path is None or r.alerts_file_bytes is None:
        return
    path = Path(path)
    kept = r.alerts_files_kept
    rotated = sorted((int(p.name.rsplit(".", 1)[1]), p) for p in path.parent.glob(
        f"{path.name}.*") if p.name.rsplit(".", 1)[1].isdigit())
    try:
        size = path.stat().st_size
    except FileNotFoundError:
        size = 0
    rotate = size >= r.alerts_file_bytes
    shift = 1 if rotate else 0
    for n, p in rotated:
        if n + shift > kept:
            plan.files.append(("rotated alerts file", p, p.stat().st_size))
    if not rotate:
        return
    if kept == 0:
        plan.files.append(("alerts file", path, size))
        return
    for n, p in sorted(rotated, reverse=True):
        if n + 1 <= kept:
            plan.rotations.append((p, path.with_name(f"{path.name}.{n + 1}")))
    plan.rotations.append((path, path.with_name(f"{path.name}.1")))


# -- state rows -------------------------------------------------------------------------
def _state_rows(plan: Plan, settings: Settings, layout: Layout, db, now: float) -> None:
    days = settings.retention.history_days
    if days is None:
        return
    cutoff = now - days * _DAY
    # Segment history: one model version per UTC day kept (the day's last), and every
    # version with a lifecycle event.
    kept_versions: set[int] = set()
    day_last: dict[int, int] = {}
    old: set[int] = set()
    for version, created, events in db.execute(
            "SELECT version, MAX(created), COUNT(event) FROM segment_history "
            "GROUP BY version ORDER BY version"):
        if created >= cutoff or events:
            kept_versions.add(version)
            continue
        old.add(version)
        day = int(created // _DAY)
        day_last[day] = max(day_last.get(day, version), version)
    kept_versions |= set(day_last.values())
    plan.history_versions = sorted(old - kept_versions)
    # Ledger rows: old ones, but never of an input still in the inbox, of a warm-up
    # under way, or of a model version the history keeps; and never the newest row,
    # whose id is how far the store's commits got (the state marker compares it, so a
    # store that lost commits is told from one that was pruned; shoal.daemon.state.marker).
    try:
        in_inbox = {e.name for e in os.scandir(layout.inbox)}
    except OSError:
        in_inbox = None        # cannot tell: remove no ledger row
    if in_inbox is not None:
        warmup = {i for (i,) in db.execute("SELECT ledger_id FROM warmup")}
        newest = db.execute("SELECT MAX(id) FROM ledger").fetchone()[0]
        for id_, name, version in db.execute(
                "SELECT id, name, model_version FROM ledger WHERE finished_at < ? ORDER BY id",
                (cutoff,)):
            if name in in_inbox or id_ in warmup or id_ == newest or (
                    version in kept_versions and version is not None):
                continue
            plan.ledger_ids.append(int(id_))
    # Notifications delivered to every sink whose alert is closed (a later notification
    # of the same alert is not 'raised'), or that close it.
    rows = db.execute("SELECT id, created, delivered_at, payload FROM alert_outbox "
                      "ORDER BY version, rowid").fetchall()
    latest: dict[str, str] = {}
    for _, _, _, payload in rows:
        p = json.loads(payload)
        latest[str(p.get("id"))] = str(p.get("status"))
    for id_, created, delivered, payload in rows:
        p = json.loads(payload)
        if created < cutoff and delivered is not None and \
                latest[str(p.get("id"))] not in _OPEN_STATUSES:
            plan.notification_ids.append(id_)


def make_plan(settings: Settings, layout: Layout, db, now: float | None = None) -> Plan:
    """What a retention pass would remove now (reads only)."""
    now = time.time() if now is None else now
    plan = Plan()
    _alerts_file(plan, settings)
    _processed(plan, settings, layout, now)
    _quarantine(plan, settings, layout, now)
    _state_rows(plan, settings, layout, db, now)
    return plan


def apply_plan(plan: Plan, store) -> list[str]:
    """Remove what ``plan`` lists (files first, then the rows, in one transaction);
    returns :meth:`Plan.lines`. A file already gone is skipped. Deletions come before
    the renames of a rotation (the oldest rotated file goes before the others move up)."""
    for _why, path, _size in plan.files:
        try:
            os.unlink(path)
        except FileNotFoundError:
            continue
    for src, dst in plan.rotations:
        try:
            os.replace(src, dst)
        except FileNotFoundError:
            continue
    if plan.ledger_ids or plan.history_versions or plan.notification_ids:
        _remove_rows(plan, store)
    lines = plan.lines()
    if lines:
        log_event("retention_applied", files=len(plan.files), rotated=len(plan.rotations),
                  ledger_rows=len(plan.ledger_ids), history_versions=len(plan.history_versions),
                  notifications=len(plan.notification_ids))
    return lines


def _remove_rows(plan: Plan, store) -> None:
    db = store.db
    with store.transaction():
        totals = compacted_totals(db)
        for chunk in _chunks(plan.ledger_ids):
            marks = ",".join("?" * len(chunk))
            add_ledger_totals(totals, db.execute(
                f"SELECT outcome, COUNT(*), COALESCE(SUM(rows), 0), "  # noqa: S608
                f"COALESCE(SUM(rows_invalid), 0) FROM ledger WHERE id IN ({marks}) "
                "GROUP BY outcome", chunk).fetchall())
            db.execute(f"DELETE FROM ledger WHERE id IN ({marks})", chunk)  # noqa: S608
        for chunk in _chunks(plan.history_versions):
            marks = ",".join("?" * len(chunk))
            db.execute(f"DELETE FROM segment_history WHERE version IN ({marks})",  # noqa: S608
                       chunk)
        removed = compacted_notifications(db)
        for chunk in _chunks(plan.notification_ids):
            marks = ",".join("?" * len(chunk))
            for (payload,) in db.execute(f"SELECT payload FROM alert_outbox "  # noqa: S608
                                         f"WHERE id IN ({marks})", chunk).fetchall():
                p = json.loads(payload)
                key = f"{p.get('status', 'raised')}/{p.get('severity', 'warning')}"
                removed[key] = removed.get(key, 0) + 1
            db.execute(f"DELETE FROM alert_delivery WHERE outbox_id IN ({marks})",  # noqa: S608
                       chunk)
            db.execute(f"DELETE FROM alert_outbox WHERE id IN ({marks})", chunk)  # noqa: S608
        for key, value in ((COMPACTED_KEY, totals), (COMPACTED_NOTIFICATIONS_KEY, removed)):
            db.execute("INSERT INTO meta (key, value) VALUES (?, ?) ON CONFLICT (key) DO "
                       "UPDATE SET value = excluded.value", (key, json.dumps(value,
                                                                              sort_keys=True)))


def _chunks(items: list, size: int = 500):
    for i in range(0, len(items), size):
        yield list(items[i:i + size])


class RetentionKeeper:
    """Applies retention between inputs, at most every ``retention.check_seconds``.

    Runs on the thread that owns the pipeline's store (the worker, from its
    ``on_result``), so its removals never interleave with an input's commit; the
    settings are the pipeline's own, so a reload applies to the next pass.
    """

    def __init__(self, pipeline, *, clock: Callable[[], float] = time.monotonic,
                 wall: Callable[[], float] = time.time):
        self.pipeline = pipeline
        self.clock = clock
        self.wall = wall
        self._next = -float("inf")

    def between_inputs(self, *_result: Any) -> None:
        if self.clock() < self._next:
            return
        self._next = self.clock() + self.pipeline.settings.retention.check_seconds
        self.run()

    def run(self) -> list[str]:
        """One pass now; a failure is logged and the service goes on (the next input's
        commit finds out whether the state store itself is in trouble)."""
        p = self.pipeline
        try:
            plan = make_plan(p.settings, p.layout, p.store.db, self.wall())
            return apply_plan(plan, p.store) if not plan.empty() else []
        except (OSError, ValueError, sqlite3.Error) as exc:
            log_event("retention_failed", logging.ERROR, detail=f"{type(exc).__name__}: {exc}")
            return []


def add_prune_command(cmd, with_config, open_service_parts) -> None:
    """``shoal prune``: one retention pass now (``--dry-run``: list it, remove nothing)."""
    sp = with_config(cmd("prune", "apply the retention settings now: delete old processed and "
                                  "quarantined inputs, rotate the alerts file, compact old "
                                  "history and ledger rows", _cmd_prune))
    sp.add_argument("--dry-run", action="store_true",
                    help="list what would be removed and remove nothing")
    sp.set_defaults(open_service_parts=open_service_parts)


def _cmd_prune(args) -> int:
    from shoal.config import load_config
    from shoal.daemon.runtime.logs import setup_logging

    settings = load_config(args.config)
    setup_logging(settings.log_level)
    if args.dry_run:
        from shoal.daemon.state.readout import StateReader

        layout = Layout.of(settings)
        reader = StateReader(layout.db)
        try:
            lines = make_plan(settings, layout, reader.db).lines()
        finally:
            reader.close()
        verb = "would remove"
    else:
        # The state lock: a running service applies retention itself, between inputs.
        with args.open_service_parts(settings) as (layout, store, _pipeline):
            lines = apply_plan(make_plan(settings, layout, store.db), store)
        verb = "removed"
    for line in lines:
        print(line)
    print(f"{verb}: {len(lines)} item(s)" if lines else "nothing to remove")
    return 0
