"""A state store as shoal wrote it before schema version 2: the version-1 schema (a copy of
the DDL of daemon/state/store.py at schema version 1, when the ledger's content column was
``sha256`` and the store recorded no digest algorithm), with inputs committed into the
warm-up buffer as a version-1 shoal committed them, their digests SHA-256 (hashlib)."""
import hashlib
import io
import sqlite3
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq

V1_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (
    key   TEXT PRIMARY KEY,
    value TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS ledger (
    id            INTEGER PRIMARY KEY,
    sha256        TEXT,
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
CREATE INDEX IF NOT EXISTS ledger_sha256 ON ledger (sha256);
CREATE TABLE IF NOT EXISTS checkpoints (
    version INTEGER PRIMARY KEY,
    created REAL NOT NULL,
    meta    TEXT NOT NULL,
    extra   TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS checkpoint_arrays (
    version INTEGER NOT NULL REFERENCES checkpoints (version) ON DELETE CASCADE,
    name    TEXT NOT NULL,
    npy     BLOB NOT NULL,
    PRIMARY KEY (version, name)
);
CREATE TABLE IF NOT EXISTS warmup (
    ledger_id INTEGER PRIMARY KEY,
    npy       BLOB NOT NULL
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
CREATE TABLE IF NOT EXISTS rebaselines (
    id            INTEGER PRIMARY KEY,
    requested     REAL NOT NULL,
    note          TEXT NOT NULL,
    applied       REAL,
    model_version INTEGER
);
"""


def write_v1_store(db: Path, inputs: list[Path], features=("f1", "f2", "f3")) -> list[str]:
    """A version-1 ``state.db`` in which each of ``inputs`` (Parquet files with fewer rows in
    all than the warm-up needs) was committed in order: a ledger row keyed by the file's
    SHA-256, a model version per input, its rows in the warm-up buffer. Returns the
    digests (hashlib's SHA-256 of each file's bytes)."""
    db.parent.mkdir(parents=True, exist_ok=True)
    con = sqlite3.connect(db, isolation_level=None)
    try:
        con.execute("PRAGMA journal_mode=WAL")
        con.execute("BEGIN")
        for statement in V1_SCHEMA.split(";"):
            if statement.strip():
                con.execute(statement)
        con.execute("INSERT INTO meta (key, value) VALUES ('schema_version', '1')")
        digests = []
        for version, path in enumerate(inputs, start=1):
            digest = hashlib.sha256(path.read_bytes()).hexdigest()
            table = pq.read_table(path)
            rows = np.column_stack([table.column(c).to_numpy() for c in features])
            cur = con.execute(
                "INSERT INTO ledger (sha256, name, size, rows, rows_invalid, outcome, labels, "
                "model_version, seen_at, finished_at) VALUES (?, ?, ?, ?, 0, 'committed', ?, "
                "?, ?, ?)", (digest, path.name, path.stat().st_size, len(rows),
                             f"{path.stem}.{digest[:16]}.labels.parquet", version,
                             1000.0 + version, 1000.5 + version))
            buf = io.BytesIO()
            np.save(buf, rows, allow_pickle=False)
            con.execute("INSERT INTO warmup (ledger_id, npy) VALUES (?, ?)",
                        (cur.lastrowid, buf.getvalue()))
            digests.append(digest)
        con.execute("INSERT INTO meta (key, value) VALUES ('model_version', ?)",
                    (str(len(inputs)),))
        con.execute("COMMIT")
    finally:
        con.close()
    return digests
