"""Read the state without touching it: the data behind ``shoal status``, the status
page, ``/status``, ``/metrics`` and ``shoal report``.

:class:`StateReader` is a :class:`~shoal.daemon.state.store.StateStore` opened
read-only (``mode=ro``, ``query_only``), so a report or a scrape can run beside
a live service without taking its lock and can never write. Alerts are read
from whichever alert table the store has; a store without alerts yet gives an
empty list.
"""
from __future__ import annotations

import json
import os
import sqlite3
import time
from pathlib import Path
from typing import Any

from shoal.config import Settings
from shoal.daemon.errors import StateError
from shoal.daemon.intake.gate import ReadinessGate
from shoal.daemon.files.layout import Layout
from shoal.daemon.runtime.liveness import service_state
from shoal.daemon.cli.quarantine_commands import quarantine_summary
from shoal.daemon.state.compacted import compacted_totals
from shoal.daemon.state.store import Checkpoint, StateStore
from shoal.daemon.state.store_words import (
    extra_in_current_words,
    notification_in_current_words,
    payload_in_current_words,
)
from shoal.daemon.views.summary import format_differences, segment_summary

__all__ = ["StateReader", "open_reader", "read_alerts", "open_alerts", "inbox_backlog", "state_snapshot",
           "format_status", "format_service", "ledger_totals"]

_ALERT_TABLES = ("alert_history", "alerts", "alert_outbox")


class StateReader(StateStore):
    """The state store opened read-only; every read method of the store works."""

    def __init__(self, path: Path):  # noqa: D107 - no schema set-up, no transaction
        self.path = Path(path)
        self.checkpoints_kept = 0
        self.clock = time.time
        if not self.path.exists():
            raise StateError(f"no state store at {self.path} yet: nothing has been processed")
        try:
            self.db = self._connect("mode=ro")
        except sqlite3.DatabaseError as exc:
            if os.access(self.path.parent, os.W_OK) and not _read_only_mount(self.path.parent):
                raise StateError(f"state store {self.path} cannot be read: {exc}") from exc
            # a read-only state folder: SQLite cannot make the shared-memory file a
            # store in WAL mode is read through, and no writer can be at work on it
            try:
                self.db = self._connect("mode=ro&immutable=1")
            except sqlite3.DatabaseError as exc2:
                raise StateError(f"state store {self.path} cannot be read: {exc2}") from exc2

    def _connect(self, flags: str) -> sqlite3.Connection:
        db = sqlite3.connect(f"file:{self.path}?{flags}", uri=True, timeout=10.0,
                             check_same_thread=False)
        try:
            db.execute("PRAGMA query_only=ON")
            db.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()
        except sqlite3.DatabaseError:
            db.close()
            raise
        return db

    def checkpoint(self, version: int) -> Checkpoint:
        """A checkpoint, its drift state in today's words (a store not yet migrated by a
        writer keeps the earlier ones on disk)."""
        cp = super().checkpoint(version)
        cp.extra = extra_in_current_words(cp.extra)
        return cp

    def alerts(self, since: float | None = None, version: int | None = None) -> list[dict]:
        """The store's alerts, in today's words (a store not yet migrated keeps the
        earlier ones on disk)."""
        return [dict(r, payload=payload_in_current_words(r["payload"]))
                for r in super().alerts(since=since, version=version)]

    def tables(self) -> set[str]:
        return {name for (name,) in self.db.execute(
            "SELECT name FROM sqlite_master WHERE type = 'table'")}


def _read_only_mount(folder: Path) -> bool:
    """Whether ``folder`` is on a file system mounted read-only (root may write anywhere
    else, so ``os.access`` says nothing there)."""
    try:
        return bool(os.statvfs(folder).f_flag & os.ST_RDONLY)
    except OSError:
        return False


def open_reader(layout: Layout) -> StateReader:
    return StateReader(layout.db)


def ledger_totals(reader: StateStore) -> dict[str, Any]:
    """Inputs and rows per ledger outcome, the last commit time and the last input."""
    by = {k: dict(v) for k, v in compacted_totals(reader.db).items()}  # rows pruned away
    for outcome, n, rows, bad in reader.db.execute(
            "SELECT outcome, COUNT(*), COALESCE(SUM(rows), 0), COALESCE(SUM(rows_invalid), 0) "
            "FROM ledger GROUP BY outcome"):
        t = by.setdefault(outcome, {"inputs": 0, "rows": 0, "rows_invalid": 0})
        t["inputs"] += n
        t["rows"] += rows
        t["rows_invalid"] += bad
    last_commit = reader.db.execute(
        "SELECT MAX(finished_at) FROM ledger WHERE outcome = 'committed'").fetchone()[0]
    last = reader.db.execute("SELECT name, outcome, rows, finished_at, model_version FROM ledger "
                             "ORDER BY id DESC LIMIT 1").fetchone()
    err = reader.db.execute("SELECT name, reason, finished_at FROM ledger "
                            "WHERE outcome = 'quarantined' ORDER BY id DESC LIMIT 1").fetchone()
    return {
        "by_outcome": by,
        "last_commit_time": last_commit,
        "last_input": None if last is None else dict(zip(
            ("name", "outcome", "rows", "time", "model_version"), last)),
        "last_error": None if err is None else dict(zip(("name", "reason", "time"), err)),
    }


def _alert_record(row: dict) -> dict:
    """One alert notification as a flat dict, whatever table it came from.

    A row's own ``id`` names the notification (``notification``); the payload's ``id``
    names the alert, the same for its raised and its cleared notification.
    """
    out = dict(row)
    out["notification"] = out.get("id")
    payload = out.pop("payload", None)
    if isinstance(payload, str):
        try:
            payload = json.loads(payload)
        except json.JSONDecodeError:
            payload = {"payload": payload}
    if isinstance(payload, dict):
        if "schema_version" not in payload:   # a store not yet migrated by a writer
            out["notification"] = notification_in_current_words(str(out["notification"]))
        payload = payload_in_current_words(payload)
        for key, value in payload.items():
            out.setdefault(key, value)
        out["id"] = payload.get("id", out.get("id"))
    out.setdefault("status", "raised")
    out.setdefault("severity", "major")
    return out


def _notification_order(record: dict) -> tuple:
    """Oldest first: by commit time, then model version (inputs committed together share a
    time), then the alert's own sequence (raised before cleared), then the name."""
    status = record.get("status")
    return (record.get("created") or 0, record.get("version") or 0,
            1 if status == "cleared" else 0, str(record.get("notification") or record.get("id")))


def read_alerts(reader: StateReader, since: float | None = None,
                limit: int | None = None) -> list[dict]:
    """Alerts newest first (``created`` epoch seconds >= ``since``); [] when none exist."""
    tables = reader.tables()
    table = next((t for t in _ALERT_TABLES if t in tables), None)
    if table is None:
        return []
    cur = reader.db.execute(f"SELECT * FROM {table}")  # noqa: S608 - name from a fixed list
    names = [d[0] for d in cur.description]
    rows = [_alert_record(dict(zip(names, r))) for r in cur.fetchall()]
    if since is not None:
        rows = [r for r in rows if (r.get("created") or 0) >= since]
    rows.sort(key=_notification_order, reverse=True)
    return rows if limit is None else rows[:limit]


def open_alerts(alerts: list[dict]) -> list[dict]:
    """Alerts whose latest notification is 'raised' (not yet cleared), newest first."""
    latest: dict[str, dict] = {}
    for a in sorted(alerts, key=_notification_order):
        latest[str(a.get("id"))] = a
    return [a for a in sorted(latest.values(), key=lambda r: r.get("created") or 0,
                              reverse=True) if a.get("status") == "raised"]


def inbox_backlog(settings: Settings, layout: Layout, done_names: set[str] | None = None,
                  now: float | None = None) -> dict[str, Any]:
    """Files waiting in the inbox and the age of the oldest (the lag), in seconds."""
    now = time.time() if now is None else now
    gate = ReadinessGate(settings.watch.settle_seconds, settings.watch.ignore)
    oldest, count = None, 0
    try:
        entries = list(os.scandir(layout.inbox))
    except OSError:
        return {"files": None, "lag_seconds": None}
    for e in entries:
        if gate.ignored(e.name) or not e.is_file(follow_symlinks=False):
            continue
        if settings.output.keep_inputs and done_names and e.name in done_names:
            continue
        count += 1
        mtime = e.stat(follow_symlinks=False).st_mtime
        oldest = mtime if oldest is None else min(oldest, mtime)
    return {"files": count, "lag_seconds": 0.0 if oldest is None else max(0.0, now - oldest)}


def state_snapshot(reader: StateReader, settings: Settings, layout: Layout,
                   now: float | None = None, recent_alerts: int = 10) -> dict[str, Any]:
    """Everything ``shoal status`` and ``/status`` show, as plain data."""
    now = time.time() if now is None else now
    summary = segment_summary(reader, settings, now=now)
    totals = ledger_totals(reader)
    latest_drift = {}
    if summary.get("checkpoint_version") is not None:
        for r in reader.db.execute("SELECT segment, drift FROM segment_history WHERE version = ?",
                                   (summary["checkpoint_version"],)):
            if r[1]:
                latest_drift[int(r[0])] = json.loads(r[1])
    for seg in summary["segments"]:
        seg["drift"] = latest_drift.get(seg["id"])
    alerts = read_alerts(reader)
    counts: dict[str, int] = {}
    for a in alerts:
        key = f"{a.get('status')}/{a.get('severity')}"
        counts[key] = counts.get(key, 0) + 1
    raised = open_alerts(alerts)
    done = None
    if settings.output.keep_inputs:
        done = {n for (n,) in reader.db.execute(
            "SELECT name FROM ledger WHERE outcome IN ('committed', 'duplicate')")}
    return {
        "time": now,
        "service": service_state(layout.state, layout.lock, now),
        "model_version": summary["model_version"],
        "features": summary["features"],
        "config_differs": summary["config_differs"],
        "warmup": summary.get("warmup"),
        "rows_learned": summary.get("rows_learned"),
        "segments": summary["segments"],
        "inputs": totals["by_outcome"],
        "last_commit_time": totals["last_commit_time"],
        "last_input": totals["last_input"],
        "last_error": totals["last_error"],
        "quarantine": quarantine_summary(layout),
        "alert_counts": counts,
        "alerts_active": len(raised),
        "recent_alerts": alerts[:recent_alerts],
        "backlog": inbox_backlog(settings, layout, done, now),
    }


def _ago(seconds: float | None) -> str:
    if seconds is None:
        return "-"
    seconds = max(0.0, seconds)
    for unit, size in (("d", 86400), ("h", 3600), ("min", 60)):
        if seconds >= size:
            return f"{seconds / size:.1f} {unit}"
    return f"{seconds:.1f} s"


def _num(v) -> str:
    return f"{v:.4g}" if isinstance(v, float) else "-" if v is None else str(v)


def format_status(snap: dict, width: int = 100) -> str:
    """One terminal screen: model, inputs, lag, segments, alerts, last error."""
    now = snap["time"]
    lines = [format_service(snap.get("service"), now)]
    inputs = snap["inputs"]
    n = {k: v["inputs"] for k, v in inputs.items()}
    lines.append(f"model version {snap['model_version']}"
                 + (f", {snap['rows_learned']} rows learned" if snap.get("rows_learned") else ""))
    lines += format_differences(snap.get("config_differs", []))
    lines.append("inputs: " + (", ".join(f"{v} {k}" for k, v in sorted(n.items())) or "none yet"))
    last = snap["last_input"]
    if last:
        lines.append(f"last input: {last['name']} ({last['outcome']}, "
                     f"{_ago(now - last['time'])} ago)")
    b = snap["backlog"]
    lines.append(f"waiting in the inbox: {b['files'] if b['files'] is not None else '?'} "
                 f"file(s); lag {_ago(b['lag_seconds'])}; last commit "
                 + (f"{_ago(now - snap['last_commit_time'])} ago" if snap["last_commit_time"]
                    else "never"))
    if snap.get("warmup"):
        w = snap["warmup"]
        lines.append(f"warming up: {w['rows']} of {w['needed']} rows buffered")
    if snap["segments"]:
        lines.append("")
        feats = list(snap["features"])
        median = snap["segments"][0].get("median", {})   # transformed features
        named = any(s.get("name") for s in snap["segments"])
        fixed = 4 if named else 3
        head = ["segment"] + (["name"] if named else []) + ["weight", "rows"] + \
            [f"{f} median" if f in median else f"{f} mean" for f in feats]
        table = [head] + [[str(s["id"])] + ([s.get("name") or "-"] if named else [])
                          + [f"{s['weight']:.3f}", str(s["rows"])]
                          + [f"{s['mean'][f]:.4g}" for f in feats] for s in snap["segments"]]
        widths = [max(len(r[i]) for r in table) for i in range(len(head))]
        shown = len(head)   # whole columns only, as many as fit the screen
        while shown > fixed and sum(widths[:shown]) + 2 * (shown - 1) > width:
            shown -= 1
        for r in table:
            lines.append("  ".join(c.ljust(w) if named and i == 1 else c.rjust(w)
                                   for i, (c, w) in enumerate(zip(r[:shown], widths))))
        if shown < len(head):
            lines.append(f"(+{len(head) - shown} more features: shoal segments -c CONFIG)")
    lines.append("")
    counts = snap["alert_counts"]
    lines.append(f"alerts: {snap.get('alerts_active', 0)} active now; notifications: "
                 + (", ".join(f"{v} {k}" for k, v in sorted(counts.items())) or "none"))
    names = {s["id"]: s.get("name") for s in snap["segments"] if s.get("name")}
    for a in snap["recent_alerts"][:5]:
        seg = a.get("segment", "-")
        name = a.get("segment_name") or names.get(seg)
        lines.append(f"  {a.get('status', '?'):9s} {a.get('severity', '?'):8s} segment "
                     f"{seg}{f' ({name})' if name else ''} {a.get('statistic', '-')} "
                     f"value {_num(a.get('value'))} bound {_num(a.get('bound'))}"[:width])
    q = snap.get("quarantine") or {}
    latest = q.get("latest")
    lines.append(f"quarantine: {q.get('count', 0)} input(s)" + (
        f"; latest {latest['name']}: {latest['reason']} ({_ago(now - latest['time'])} ago)"
        if latest else "")[:width])
    err = snap["last_error"]
    lines.append("last error: " + ("none" if err is None else
                                   f"{err['name']}: {err['reason']} "
                                   f"({_ago(now - err['time'])} ago)"[:width]))
    failure = (snap.get("service") or {}).get("last_failure")
    if failure:
        lines.append(f"last worker failure: {failure.get('detail')} (pid {failure.get('pid')}, "
                     f"{_ago(now - failure['time'])} ago)"[:width])
    return "\n".join(lines)


def format_service(service: dict | None, now: float) -> str:
    """'service: running, pid N, last progress 1.2 s ago' or 'service: not running ...'."""
    if not service:
        return "service: unknown"
    if service["running"]:
        text = f"service: running, pid {service['pid'] or '?'}"
        if service.get("last_progress") is not None:
            text += f", last progress {_ago(now - service['last_progress'])} ago"
        if service.get("worker_alive") is False:
            text += " (its worker has stopped)"
        return text
    text = "service: not running"
    last = service.get("last_run")
    if last and last.get("pid"):
        when = last.get("stopped") or last.get("last_progress")
        text += (f" (last run pid {last['pid']}"
                 + (f", ended {_ago(now - when)} ago" if when else "") + ")")
    return text
