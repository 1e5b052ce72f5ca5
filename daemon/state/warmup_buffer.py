"""The warm-up buffer: rows of the inputs taken before the first model exists.

Until warm-up fits the first model, each input's valid rows (and which of its rows
they are) are kept in the store, committed with the input; a duplicate taken then is
kept too, to be labelled but not learned from. Once the model exists, the inputs are
labelled from here and the buffer is cleared in the same transaction.
"""
from __future__ import annotations

import sqlite3

import numpy as np

from shoal.daemon.state.blobs import npy_array, npy_bytes
from shoal.daemon.state.records import InputCommit, WarmupInput

__all__ = ["insert_warmup", "clear_warmup", "warmup_rows", "warmup_inputs"]


def insert_warmup(db: sqlite3.Connection, entry_id: int, c: InputCommit) -> None:
    """Buffer what input ``c`` (ledger row ``entry_id``) holds for warm-up (inside the
    caller's transaction)."""
    if c.warmup_rows is not None and len(c.warmup_rows):
        db.execute("INSERT INTO warmup (ledger_id, npy) VALUES (?, ?)",
                   (entry_id, npy_bytes(c.warmup_rows)))
        if c.warmup_valid is not None:
            db.execute("INSERT INTO warmup_valid (ledger_id, npy) VALUES "
                       "(?, ?)", (entry_id, npy_bytes(c.warmup_valid)))
    if c.duplicate_rows is not None and len(c.duplicate_rows[0]):
        db.execute("INSERT INTO warmup_duplicates (ledger_id, npy, valid) "
                   "VALUES (?, ?, ?)", (entry_id,
                                        npy_bytes(c.duplicate_rows[0]),
                                        npy_bytes(c.duplicate_rows[1])))


def clear_warmup(db: sqlite3.Connection) -> None:
    """Empty the buffer (inside the caller's transaction)."""
    db.execute("DELETE FROM warmup")
    db.execute("DELETE FROM warmup_valid")
    db.execute("DELETE FROM warmup_duplicates")


def warmup_rows(db: sqlite3.Connection) -> np.ndarray | None:
    """The buffered warm-up rows in arrival order, or None when there are none."""
    blobs = [npy_array(b) for (b,) in db.execute(
        "SELECT npy FROM warmup ORDER BY ledger_id")]
    return np.concatenate(blobs, axis=0) if blobs else None


def warmup_inputs(db: sqlite3.Connection) -> list[WarmupInput]:
    """The inputs taken before the first model, in arrival order."""
    rows = db.execute(
        "SELECT warmup.ledger_id, ledger.labels, warmup.npy, warmup_valid.npy, 1 "
        "FROM warmup JOIN ledger ON ledger.id = warmup.ledger_id "
        "LEFT JOIN warmup_valid ON warmup_valid.ledger_id = warmup.ledger_id "
        "UNION ALL SELECT d.ledger_id, ledger.labels, d.npy, d.valid, 0 "
        "FROM warmup_duplicates d JOIN ledger ON ledger.id = d.ledger_id "
        "ORDER BY 1").fetchall()
    return [WarmupInput(labels, npy_array(rows_npy),
                        None if valid is None else npy_array(valid), bool(learned))
            for _, labels, rows_npy, valid, learned in rows]
