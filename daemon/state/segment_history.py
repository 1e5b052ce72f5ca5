"""The segment history: one row per segment per model version, and the lifecycle events.

Written with the input that made the version (weight, rows, mean, spread summary,
drift scores, and a birth, retirement, merge or split when one happened); the
report, the status page and ``shoal history`` read it back.
"""
from __future__ import annotations

import json
import sqlite3
from typing import Any, Iterable

from shoal.daemon.state.records import HistoryRow

__all__ = ["insert_history", "history_rows", "segment_events"]


def insert_history(db: sqlite3.Connection, history: Iterable[HistoryRow], version: int,
                   now: float) -> None:
    """Segment history rows of one model version (inside the caller's transaction)."""
    for h in history:
        db.execute(
            "INSERT INTO segment_history (version, segment, weight, rows, mean, spread, "
            "drift, event, created) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (version, int(h.segment), float(h.weight), int(h.rows), json.dumps(h.mean),
             json.dumps(h.spread), json.dumps(h.drift) if h.drift else None, h.event, now))


def history_rows(db: sqlite3.Connection, segment: int | None = None) -> list[dict[str, Any]]:
    """Every history row (of ``segment``, if given) by version and segment."""
    sql = ("SELECT version, segment, weight, rows, mean, spread, drift, event, created "
           "FROM segment_history")
    args: tuple = ()
    if segment is not None:
        sql += " WHERE segment = ?"
        args = (segment,)
    out = []
    for v, s, w, n, mean, spread, drift, event, created in db.execute(
            sql + " ORDER BY version, segment", args):
        out.append({"version": v, "segment": s, "weight": w, "rows": n,
                    "mean": json.loads(mean), "spread": json.loads(spread),
                    "drift": json.loads(drift) if drift else None, "event": event,
                    "created": created})
    return out


def segment_events(db: sqlite3.Connection) -> list[dict[str, Any]]:
    """History rows that record a lifecycle event (born, retired, merged), oldest first."""
    return [{"version": v, "segment": s, "weight": w, "mean": json.loads(mean),
             "spread": json.loads(spread), "event": event, "created": created}
            for v, s, w, mean, spread, event, created in db.execute(
                "SELECT version, segment, weight, mean, spread, event, created FROM "
                "segment_history WHERE event IS NOT NULL ORDER BY version, segment")]
