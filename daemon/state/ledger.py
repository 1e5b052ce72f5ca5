"""The ledger and the attempts table: which inputs were taken, and which are in progress.

The ledger has one row per input taken (content digest, name, size, rows, outcome,
labels file, model version, times); it is how an input already done is recognised
after a restart. The attempts table counts how many processes took an input without
finishing it, so a poison input is found out even when it kills the process. These
functions run SQL on a connection; :class:`~shoal.daemon.state.store.StateStore`
owns the transactions around them and the clock.
"""
from __future__ import annotations

import sqlite3
from typing import Callable, Iterable

from shoal.daemon.state.records import LedgerEntry

__all__ = ["insert_entry", "find_done", "ledger_entries", "ledger_rows", "add_attempts",
           "attempt_counts", "clear_attempt", "ATTEMPTS_KEPT_SECONDS", "note_quarantined"]

# Attempt rows of inputs that never finished here (gone from the inbox meanwhile) are
# dropped after this long.
ATTEMPTS_KEPT_SECONDS = 7 * 86400


def insert_entry(db: sqlite3.Connection, e: LedgerEntry, model_version: int | None,
                 clock: Callable[[], float]) -> int:
    """Insert one ledger row (inside the caller's transaction); its id. ``clock`` gives
    the finish time of an entry that has none."""
    cur = db.execute(
        "INSERT INTO ledger (digest, name, size, rows, rows_invalid, outcome, reason, "
        "labels, model_version, seen_at, finished_at) VALUES (?,?,?,?,?,?,?,?,?,?,?)",
        (e.digest, e.name, e.size, e.rows, e.rows_invalid, e.outcome, e.reason, e.labels,
         model_version if model_version is not None else e.model_version,
         e.seen_at, e.finished_at or clock()))
    return int(cur.lastrowid)


def _entry(row) -> LedgerEntry:
    (id_, digest, name, size, rows, bad, outcome, reason, labels, version, seen,
     finished) = row
    return LedgerEntry(digest=digest, name=name, size=size, rows=rows, rows_invalid=bad,
                       outcome=outcome, reason=reason, labels=labels,
                       model_version=version, seen_at=seen, finished_at=finished, id=id_)


def find_done(db: sqlite3.Connection, digest: str) -> list[LedgerEntry]:
    """Committed or duplicate inputs with this content digest, oldest first."""
    rows = db.execute(
        "SELECT * FROM ledger WHERE digest = ? AND outcome IN ('committed', 'duplicate') "
        "ORDER BY id", (digest,)).fetchall()
    return [_entry(r) for r in rows]


def ledger_entries(db: sqlite3.Connection, outcome: str | None = None) -> list[LedgerEntry]:
    """Every ledger row (of ``outcome``, if given), oldest first."""
    sql = "SELECT * FROM ledger"
    args: tuple = ()
    if outcome is not None:
        sql += " WHERE outcome = ?"
        args = (outcome,)
    return [_entry(r) for r in db.execute(sql + " ORDER BY id", args)]


def ledger_rows(db: sqlite3.Connection) -> int:
    """How many ledger rows were ever written (the highest id: pruning keeps it)."""
    return int(db.execute("SELECT COALESCE(MAX(id), 0) FROM ledger").fetchone()[0])


def add_attempts(db: sqlite3.Connection, keys: list[str], add: int, now: float) -> None:
    """Add ``add`` to each key's attempt count and drop finished or stale rows (inside the
    caller's transaction)."""
    db.executemany(
        "INSERT INTO attempts (input, count, last_at) VALUES (?, ?, ?) ON "
        "CONFLICT (input) DO UPDATE SET count = count + excluded.count, "
        "last_at = excluded.last_at", [(k, add, now) for k in keys])
    db.execute("DELETE FROM attempts WHERE count <= 0 OR last_at < ?",
               (now - ATTEMPTS_KEPT_SECONDS,))


def attempt_counts(db: sqlite3.Connection, keys: Iterable[str]) -> dict[str, int]:
    """Each key's attempt count, 0 for none."""
    keys = list(keys)
    found = {}
    for i in range(0, len(keys), 500):
        part = keys[i:i + 500]
        found.update(db.execute(
            f"SELECT input, count FROM attempts WHERE input IN "
            f"({', '.join('?' * len(part))})", part).fetchall())
    return {k: int(found.get(k, 0)) for k in keys}


def clear_attempt(db: sqlite3.Connection, key: str) -> None:
    """Forget an input's attempts: it is finished (committed or quarantined)."""
    db.execute("DELETE FROM attempts WHERE input = ?", (key,))


def note_quarantined(db: sqlite3.Connection, name: str, note: str) -> bool:
    """Append ``note`` to the reason of the input ``name``'s latest quarantined ledger row
    (``shoal quarantine retry | drop`` say what became of it); False if it has none."""
    cur = db.execute(
        "UPDATE ledger SET reason = COALESCE(reason, '') || ? WHERE id = (SELECT MAX(id) "
        "FROM ledger WHERE outcome = 'quarantined' AND name = ?)", (f" · {note}", name))
    return cur.rowcount == 1
