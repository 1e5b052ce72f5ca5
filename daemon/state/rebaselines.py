"""Re-baseline requests: ``shoal rebaseline`` asks, the service applies at an input.

A request is a row that waits until the service takes it; applying it (with the next
input, or at once when the service is idle) marks it with the model version it went
into. Kept in the store so a request survives a restart and is applied exactly once.
"""
from __future__ import annotations

import sqlite3

__all__ = ["request_rebaseline", "cancel_rebaseline", "pending_rebaseline", "rebaseline_rows",
           "mark_rebaseline"]


def request_rebaseline(db: sqlite3.Connection, note: str, now: float) -> int:
    """Add a request (inside the caller's transaction); its id."""
    cur = db.execute("INSERT INTO rebaselines (requested, note) VALUES (?, ?)", (now, note))
    return int(cur.lastrowid)


def cancel_rebaseline(db: sqlite3.Connection, request_id: int) -> None:
    """Drop a request not applied yet (inside the caller's transaction)."""
    db.execute("DELETE FROM rebaselines WHERE id = ? AND applied IS NULL", (request_id,))


def pending_rebaseline(db: sqlite3.Connection) -> tuple[int, str] | None:
    """The oldest request not yet applied, as (id, note)."""
    row = db.execute("SELECT id, note FROM rebaselines WHERE applied IS NULL "
                     "ORDER BY id LIMIT 1").fetchone()
    return None if row is None else (int(row[0]), row[1])


def rebaseline_rows(db: sqlite3.Connection) -> list[dict]:
    """Every request, oldest first."""
    return [{"id": i, "requested": r, "note": n, "applied": a, "model_version": v}
            for i, r, n, a, v in db.execute(
                "SELECT id, requested, note, applied, model_version FROM rebaselines "
                "ORDER BY id")]


def mark_rebaseline(db: sqlite3.Connection, request_id: int, version: int, now: float) -> None:
    """Mark a request applied at model ``version`` (inside the caller's transaction)."""
    db.execute("UPDATE rebaselines SET applied = ?, model_version = ? WHERE id = ?",
               (now, version, request_id))
