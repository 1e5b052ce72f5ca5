"""The store's schema: its tables, its version, and the migrations from older versions.

:data:`SCHEMA_SQL` makes the tables of a new store (and any a migrated one lacks);
:data:`MIGRATIONS` brings a store of an earlier :data:`SCHEMA_VERSION` up to date, one
version at a time, inside the transaction that opens it, so a failed migration leaves
the store as it was. The ``meta`` table's key-value helpers live here too, since the
schema version is one of its keys. This module knows tables and columns, not what the
service does with them.
"""
from __future__ import annotations

import sqlite3

from shoal.daemon.errors import StateError
from shoal.daemon.state.blobs import checksum, json_checksum
from shoal.daemon.state.store_words import migrate_alert_words

__all__ = ["SCHEMA_VERSION", "SCHEMA_SQL", "MIGRATIONS", "create_tables", "schema_version",
           "migrate", "read_meta", "write_meta"]

# 2: the ledger's content column is `digest` (was `sha256`), in the algorithm the meta
#    key `digest_algorithm` records (a version-1 store's is SHA-256).
# 3: alert notifications and the drift state in the alert words of daemon/state/store_words.py
#    (raised/cleared, X.733 severities, the baseline).
# 4: each checkpoint array, and each checkpoint's meta and extra JSON, carries a checksum
#    verified when it is loaded.
# 5: the attempts table (inputs being processed, and how many processes ended while
#    processing them).
SCHEMA_VERSION = 5

SCHEMA_SQL = """
CREATE TABLE IF NOT EXISTS meta (
    key   TEXT PRIMARY KEY,
    value TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS ledger (
    id            INTEGER PRIMARY KEY,
    digest        TEXT,
    name          TEXT NOT NULL,
    size          INTEGER NOT NULL,
    rows          INTEGER,
    rows_invalid  INTEGER,
    outcome       TEXT NOT NULL CHECK (outcome IN ('committed', 'duplicate', 'quarantined')),
    reason        TEXT,
    labels        TEXT,
    model_version INTEGER,
    seen_at       REAL NOT NULL,
    finished_at   REAL NOT NULL
);
CREATE INDEX IF NOT EXISTS ledger_digest ON ledger (digest);
CREATE TABLE IF NOT EXISTS checkpoints (
    version INTEGER PRIMARY KEY,
    created REAL NOT NULL,
    meta    TEXT NOT NULL,
    extra   TEXT NOT NULL,
    checksum TEXT
);
CREATE TABLE IF NOT EXISTS checkpoint_arrays (
    version INTEGER NOT NULL REFERENCES checkpoints (version) ON DELETE CASCADE,
    name    TEXT NOT NULL,
    npy     BLOB NOT NULL,
    checksum TEXT,
    PRIMARY KEY (version, name)
);
CREATE TABLE IF NOT EXISTS warmup (
    ledger_id INTEGER PRIMARY KEY,
    npy       BLOB NOT NULL
);
CREATE TABLE IF NOT EXISTS warmup_valid (
    ledger_id INTEGER PRIMARY KEY,
    npy       BLOB NOT NULL
);
CREATE TABLE IF NOT EXISTS warmup_duplicates (
    ledger_id INTEGER PRIMARY KEY,
    npy       BLOB NOT NULL,
    valid     BLOB NOT NULL
);
CREATE TABLE IF NOT EXISTS segment_history (
    version INTEGER NOT NULL,
    segment INTEGER NOT NULL,
    weight  REAL NOT NULL,
    rows    INTEGER NOT NULL,
    mean    TEXT NOT NULL,
    spread  TEXT NOT NULL,
    drift   TEXT,
    event   TEXT,
    created REAL NOT NULL,
    PRIMARY KEY (version, segment)
);
CREATE TABLE IF NOT EXISTS alert_outbox (
    id           TEXT PRIMARY KEY,
    version      INTEGER NOT NULL,
    created      REAL NOT NULL,
    payload      TEXT NOT NULL,
    delivered_at REAL,
    attempts     INTEGER NOT NULL DEFAULT 0
);
CREATE TABLE IF NOT EXISTS alert_delivery (
    outbox_id    TEXT NOT NULL REFERENCES alert_outbox (id),
    sink         TEXT NOT NULL,
    delivered_at REAL,
    attempts     INTEGER NOT NULL DEFAULT 0,
    next_at      REAL,
    last_error   TEXT,
    PRIMARY KEY (outbox_id, sink)
);
CREATE TABLE IF NOT EXISTS attempts (
    input   TEXT PRIMARY KEY,
    count   INTEGER NOT NULL,
    last_at REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS rebaselines (
    id            INTEGER PRIMARY KEY,
    requested     REAL NOT NULL,
    note          TEXT NOT NULL,
    applied       REAL,
    model_version INTEGER
);
"""


def _migrate_1_to_2(db: sqlite3.Connection) -> None:
    """Version 1 -> 2: the ledger's ``sha256`` column becomes ``digest``, and the store
    records that its digests are SHA-256 (what version 1 made) and stay so: an input
    committed before the upgrade is still found done after it."""
    db.execute("ALTER TABLE ledger RENAME COLUMN sha256 TO digest")
    db.execute("DROP INDEX IF EXISTS ledger_sha256")
    db.execute("CREATE INDEX ledger_digest ON ledger (digest)")
    db.execute("INSERT INTO meta (key, value) VALUES ('digest_algorithm', 'sha256')")


def _migrate_3_to_4(db: sqlite3.Connection) -> None:
    """Version 3 -> 4: checksums of the checkpoints kept, computed from what the store holds
    now (a checkpoint damaged before the upgrade is not found out by them; one damaged
    after it is)."""
    db.execute("ALTER TABLE checkpoints ADD COLUMN checksum TEXT")
    db.execute("ALTER TABLE checkpoint_arrays ADD COLUMN checksum TEXT")
    for version, meta, extra in db.execute(
            "SELECT version, meta, extra FROM checkpoints").fetchall():
        db.execute("UPDATE checkpoints SET checksum = ? WHERE version = ?",
                   (json_checksum(meta, extra), version))
    for version, name, blob in db.execute("SELECT version, name, npy FROM "
                                          "checkpoint_arrays").fetchall():
        db.execute("UPDATE checkpoint_arrays SET checksum = ? WHERE version = ? AND name = ?",
                   (checksum(blob), version, name))


def _migrate_4_to_5(db: sqlite3.Connection) -> None:
    """Version 4 -> 5: the ``attempts`` table (inputs being processed, and how many
    processes ended while processing them)."""
    db.execute("CREATE TABLE IF NOT EXISTS attempts (input TEXT PRIMARY KEY, count INTEGER NOT NULL, "
               "last_at REAL NOT NULL)")


# schema version -> the function that brings a store of that version to the next one
MIGRATIONS = {1: _migrate_1_to_2, 2: migrate_alert_words, 3: _migrate_3_to_4,
              4: _migrate_4_to_5}


def create_tables(db: sqlite3.Connection) -> None:
    """Every table and index of :data:`SCHEMA_SQL` that is not there yet."""
    for statement in SCHEMA_SQL.split(";"):
        if statement.strip():
            db.execute(statement)


def read_meta(db: sqlite3.Connection, key: str) -> str | None:
    """The ``meta`` value of ``key``, or None."""
    row = db.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
    return None if row is None else row[0]


def write_meta(db: sqlite3.Connection, key: str, value: str) -> None:
    """Set the ``meta`` value of ``key`` (inside the caller's transaction)."""
    db.execute("INSERT INTO meta (key, value) VALUES (?, ?) "
               "ON CONFLICT (key) DO UPDATE SET value = excluded.value", (key, value))


def schema_version(db: sqlite3.Connection) -> int | None:
    """The stored schema version; None for a new (empty) store."""
    if db.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' AND "
                  "name = 'meta'").fetchone() is None:
        return None
    found = read_meta(db, "schema_version")
    return None if found is None else int(found)


def migrate(db: sqlite3.Connection, found: int, path) -> bool:
    """Bring the store at ``path`` of schema version ``found`` to :data:`SCHEMA_VERSION`
    inside the caller's (opening) transaction; True if it changed."""
    if found > SCHEMA_VERSION:
        raise StateError(f"state store {path} has schema version {found}; "
                         f"this shoal reads versions up to {SCHEMA_VERSION}")
    if found < min(MIGRATIONS):
        raise StateError(f"state store {path} has schema version {found}, which "
                         f"this shoal cannot migrate (it migrates versions "
                         f"{min(MIGRATIONS)} to {SCHEMA_VERSION - 1})")
    for version in range(found, SCHEMA_VERSION):
        MIGRATIONS[version](db)
    if found == SCHEMA_VERSION:
        return False
    write_meta(db, "schema_version", str(SCHEMA_VERSION))
    return True
