"""The alert outbox: alert notifications committed with their input, and their delivery.

A notification is written in the same transaction as the model version that raised
it, so none is lost or sent twice across a crash; delivery is recorded per sink
(``alert_delivery``) after the commit, by the sender on its own connection. The outbox
is also the alert history that ``shoal alerts``, the status page and the report read.
"""
from __future__ import annotations

import json
import sqlite3
from typing import Any, Iterable, Mapping

__all__ = ["insert_alerts", "pending_alerts", "alert_rows", "deliveries_due",
           "next_delivery_at", "record_delivery", "retry_undelivered_now"]


def insert_alerts(db: sqlite3.Connection, alerts: Iterable[tuple[str, Mapping[str, Any]]],
                  version: int, now: float) -> None:
    """Queue notifications of model ``version``; an id already there is kept as it was
    (inside the caller's transaction)."""
    for alert_id, payload in alerts:
        db.execute("INSERT OR IGNORE INTO alert_outbox (id, version, created, "
                   "payload) VALUES (?, ?, ?, ?)",
                   (alert_id, version, now, json.dumps(payload, sort_keys=True)))


def pending_alerts(db: sqlite3.Connection) -> list[tuple[str, dict]]:
    """Undelivered notifications, oldest first, as (id, payload)."""
    return [(i, json.loads(p)) for i, p in db.execute(
        "SELECT id, payload FROM alert_outbox WHERE delivered_at IS NULL "
        "ORDER BY version, rowid")]


def alert_rows(db: sqlite3.Connection, since: float | None = None,
               version: int | None = None) -> list[dict]:
    """Every notification (created since ``since``, of model ``version``), oldest first."""
    sql = "SELECT id, version, created, delivered_at, payload FROM alert_outbox"
    where, args = [], []
    if since is not None:
        where.append("created >= ?")
        args.append(since)
    if version is not None:
        where.append("version = ?")
        args.append(version)
    if where:
        sql += " WHERE " + " AND ".join(where)
    return [{"notification": i, "version": v, "created": c, "delivered_at": d,
             "payload": json.loads(p)}
            for i, v, c, d, p in db.execute(sql + " ORDER BY version, rowid", args)]


def deliveries_due(db: sqlite3.Connection, sinks: list[str], now: float, limit: int = 100):
    """Undelivered (notification, sink, attempts, payload text) due by ``now``, oldest
    first; a missing delivery row counts as due with no attempts. Each sink gets its
    notifications in order: one waiting for its retry holds back the later ones."""
    out = []
    waiting: set[str] = set()
    rows = db.execute("SELECT id, payload FROM alert_outbox WHERE delivered_at IS NULL "
                      "ORDER BY version, rowid LIMIT ?", (limit,)).fetchall()
    for outbox_id, payload in rows:
        for sink in sinks:
            if sink in waiting:
                continue
            row = db.execute("SELECT delivered_at, attempts, next_at FROM "
                             "alert_delivery WHERE outbox_id = ? AND sink = ?",
                             (outbox_id, sink)).fetchone()
            if row is None:
                out.append((outbox_id, sink, 0, payload))
            elif row[0] is None and (row[2] is None or row[2] <= now):
                out.append((outbox_id, sink, row[1], payload))
            elif row[0] is None:
                waiting.add(sink)
    return out


def next_delivery_at(db: sqlite3.Connection) -> float | None:
    """When the next retry of an undelivered notification is due, or None."""
    row = db.execute("SELECT MIN(d.next_at) FROM alert_delivery d JOIN alert_outbox o "
                     "ON o.id = d.outbox_id WHERE d.delivered_at IS NULL "
                     "AND o.delivered_at IS NULL").fetchone()
    return row[0]


def record_delivery(db: sqlite3.Connection, outbox_id: str, sink: str, *, ok: bool,
                    attempts: int, next_at: float | None, error: str | None,
                    sinks: list[str], now: float) -> None:
    """Note one attempt (inside the caller's transaction); the notification is delivered
    once every sink in ``sinks`` has it."""
    db.execute(
        "INSERT INTO alert_delivery (outbox_id, sink, delivered_at, attempts, next_at, "
        "last_error) VALUES (?, ?, ?, ?, ?, ?) ON CONFLICT (outbox_id, sink) DO UPDATE "
        "SET delivered_at = excluded.delivered_at, attempts = excluded.attempts, "
        "next_at = excluded.next_at, last_error = excluded.last_error",
        (outbox_id, sink, now if ok else None, attempts, next_at, error))
    db.execute("UPDATE alert_outbox SET attempts = attempts + 1 WHERE id = ?",
               (outbox_id,))
    if ok:
        marks = "?" + ", ?" * (len(sinks) - 1) if sinks else "''"
        done = db.execute(
            f"SELECT COUNT(*) FROM alert_delivery WHERE outbox_id = ? AND "
            f"delivered_at IS NOT NULL AND sink IN ({marks})",
            (outbox_id, *sinks)).fetchone()[0]
        if done >= len(sinks):
            db.execute("UPDATE alert_outbox SET delivered_at = ? WHERE id = ?",
                       (now, outbox_id))


def retry_undelivered_now(db: sqlite3.Connection) -> int:
    """Make every undelivered notification due at once (inside the caller's transaction);
    how many delivery rows changed."""
    return db.execute("UPDATE alert_delivery SET next_at = NULL, attempts = 0 "
                      "WHERE delivered_at IS NULL").rowcount
