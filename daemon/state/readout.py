"""Read the state without touching it: the data behind ``shoal status``, ``shoal
segments``, the status page, ``/status``, ``/metrics`` and ``shoal report``.

:class:`StateReader` is a :class:`~shoal.daemon.state.store.StateStore` opened
read-only (``mode=ro``, ``query_only``), so a report or a scrape can run beside
a live service without taking its lock and can never write. Alerts are read
from whichever alert table the store has; a store without alerts yet gives an
empty list. This module reads and returns plain data; the views
(:mod:`shoal.daemon.views`) and the HTTP and metrics endpoints
(:mod:`shoal.daemon.runtime`) draw it and compute nothing from the state again.
"""
from __future__ import annotations

import json
import os
import sqlite3
import time
from pathlib import Path
from typing import Any

from shoal.config import Settings
from shoal.core import Mixture
from shoal.daemon.errors import StateError
from shoal.daemon.intake.gate import ReadinessGate
from shoal.daemon.files.layout import Layout
from shoal.daemon.model.contract import settings_of_model
from shoal.daemon.model.transforming import feature_centres, from_meta
from shoal.daemon.runtime.liveness import service_state
from shoal.daemon.files.quarantine import quarantine_summary
from shoal.daemon.state.compacted import add_ledger_totals, compacted_totals
from shoal.daemon.state.store import Checkpoint, StateStore
from shoal.daemon.segments.segment_names import segment_names
from shoal.daemon.state.store_words import (
    extra_in_current_words,
    notification_in_current_words,
    payload_in_current_words,
)

__all__ = ["StateReader", "open_reader", "read_alerts", "open_alerts", "inbox_backlog", "state_snapshot",
           "ledger_totals", "notification_counts", "segment_summary", "ledger_rows_after",
           "latest_history_version", "segment_rows_at", "undelivered_count",
           "checkpoint_extras"]

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
    add_ledger_totals(by, reader.db.execute(
        "SELECT outcome, COUNT(*), COALESCE(SUM(rows), 0), COALESCE(SUM(rows_invalid), 0) "
        "FROM ledger GROUP BY outcome"))
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


def segment_summary(store: StateStore, settings: Settings, now: float | None = None,
                    include_gone: bool = False) -> dict:
    """Model version, warm-up progress and one record per current segment; with
    ``include_gone``, also the segments that retired or merged away (``gone``). The
    segments are shown under the stored model's feature names; ``config_differs`` lists
    the keys where the config differs from the stored model's contract."""
    now = time.time() if now is None else now
    settings, differs = settings_of_model(store, settings)
    cp = store.latest_checkpoint()
    out: dict[str, Any] = {"model_version": store.model_version,
                           "features": list(settings.features), "segments": [],
                           "config_differs": differs}
    if cp is None:   # no model yet: the inputs taken so far only fill the warm-up
        buffered = store.warmup_rows()
        out["warmup"] = {"rows": 0 if buffered is None else int(len(buffered)),
                         "needed": settings.warmup_rows, "inputs": store.model_version}
        out["model_version"] = None
        return out
    m = Mixture.from_state(cp.arrays, cp.meta)
    names = segment_names(store.db)
    means, stds = m.data_means(), m.data_stds()
    transforms = from_meta(cp.meta, m.n_features)
    rows = cp.extra.get("segment_rows", {})
    born = cp.extra.get("segment_born", {})
    out["checkpoint_version"] = cp.version
    out["rows_learned"] = int(m.n_rows)
    for k, sid in enumerate(m.ids.tolist()):
        b = born.get(str(sid), {})
        record = {
            "id": int(sid),
            "name": names.get(int(sid)),
            "weight": float(m.weights[k]),
            "rows": int(rows.get(str(sid), 0)),
            "mean": {f: float(v) for f, v in zip(settings.features, means[k])},
            "spread": {f: float(v) for f, v in zip(settings.features, stds[k])},
            "born_version": b.get("version"),
            "age_versions": None if b.get("version") is None else cp.version - b["version"],
            "age_seconds": None if b.get("time") is None else round(now - b["time"], 1),
        }
        _in_data_units(record, feature_centres(transforms, settings.features, means[k],
                                                stds[k]))
        out["segments"].append(record)
    if include_gone:
        out["gone"] = _gone_segments(store, settings, set(m.ids.tolist()), born)
        for g in out["gone"]:
            g["name"] = names.get(g["id"])
    return out


def _in_data_units(record: dict, centres: dict) -> None:
    """A transformed feature's ``mean`` is its median in the data's units (``median``),
    its ``spread`` None and ``interval`` the central 68% interval (a segment is
    Gaussian in the model's units, not in the data's)."""
    if not centres:
        return
    record["median"] = {f: c["median"] for f, c in centres.items()}
    record["interval"] = {f: c["interval"] for f, c in centres.items()}
    for f, c in centres.items():
        record["mean"][f] = c["median"]
        record["spread"][f] = None


def _gone_segments(store: StateStore, settings: Settings, current: set, born: dict) -> list:
    """Segments that left the model: when, how, and their last mean and spread."""
    gone = {}
    for h in store.segment_events():
        if h["segment"] in current or not h["event"].startswith(("retired", "merged into")):
            continue
        gone[h["segment"]] = {
            "id": int(h["segment"]), "ended": h["event"], "ended_version": h["version"],
            "born_version": born.get(str(h["segment"]), {}).get("version"),
            "mean": {f: float(v) for f, v in zip(settings.features, h["mean"])},
            "spread": {f: float(v) for f, v in zip(settings.features, h["spread"])}}
    return [gone[k] for k in sorted(gone)]


def ledger_rows_after(reader: StateStore, last_id: int) -> list[tuple]:
    """Ledger rows written after row ``last_id``, oldest first, as (id, outcome, rows,
    rows_invalid, seen_at, finished_at): what a scrape adds to the counters it keeps."""
    return reader.db.execute(
        "SELECT id, outcome, rows, rows_invalid, seen_at, finished_at FROM ledger "
        "WHERE id > ? ORDER BY id", (last_id,)).fetchall()


def latest_history_version(reader: StateStore) -> int | None:
    """The newest model version with segment history rows, or None."""
    return reader.db.execute("SELECT MAX(version) FROM segment_history").fetchone()[0]


def segment_rows_at(reader: StateStore, version: int) -> list[tuple]:
    """The segment history rows of model ``version`` by segment, as (segment, weight,
    drift JSON text or None)."""
    return reader.db.execute("SELECT segment, weight, drift FROM segment_history "
                             "WHERE version = ? ORDER BY segment", (version,)).fetchall()


def undelivered_count(reader: StateStore) -> int:
    """Notifications in the outbox not yet delivered to every sink."""
    return reader.db.execute(
        "SELECT COUNT(*) FROM alert_outbox WHERE delivered_at IS NULL").fetchone()[0]


def checkpoint_extras(reader: StateStore) -> list[dict]:
    """The extra data (drift and lifecycle state) of every kept checkpoint, oldest first."""
    return [json.loads(extra) for (extra,) in
            reader.db.execute("SELECT extra FROM checkpoints ORDER BY version")]


def notification_counts(alerts: list[dict]) -> dict[tuple[str, str], int]:
    """How many notifications of ``alerts`` there are by (status, severity), in the order
    each pair first appears."""
    counts: dict[tuple[str, str], int] = {}
    for a in alerts:
        key = (str(a.get("status")), str(a.get("severity")))
        counts[key] = counts.get(key, 0) + 1
    return counts


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
        for segment, _, drift in segment_rows_at(reader, summary["checkpoint_version"]):
            if drift:
                latest_drift[int(segment)] = json.loads(drift)
    for seg in summary["segments"]:
        seg["drift"] = latest_drift.get(seg["id"])
    alerts = read_alerts(reader)
    counts = {f"{status}/{severity}": n
              for (status, severity), n in notification_counts(alerts).items()}
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
