"""The state store: one SQLite database (WAL, ``synchronous=FULL``).

It holds the ledger (one row per input, keyed by the input's content digest in the
algorithm the store records: :mod:`shoal.daemon.files.digest`), model checkpoints (numpy arrays as
``.npy`` bytes, read back with ``allow_pickle=False``), the warm-up buffer,
the segment history and the alert outbox. :meth:`StateStore.commit_input`
writes everything one input changes in ONE transaction, and
:meth:`StateStore.commit_inputs` several inputs in order in one transaction (all
of them or none): the exactly-once rule of the design rests on it.

A store of an earlier schema version is migrated when it is opened, in the transaction
that opens it (:data:`MIGRATIONS`): all of a migration or none of it.
"""
from __future__ import annotations

import contextlib
import hashlib
import io
import json
import logging
import sqlite3
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterable, Mapping

import numpy as np

from shoal.daemon.files.digest import (
    DIGEST_ALGORITHMS,
    NEW_STORE_ALGORITHM,
    UNRECORDED_ALGORITHM,
    check_algorithm,
)
from shoal.daemon.errors import StateError
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.state.store_words import migrate_alert_words
from shoal.daemon.state.marker import MarkerWriter, create_marker, new_store_id, read_marker

__all__ = ["StateStore", "LedgerEntry", "Checkpoint", "HistoryRow", "InputCommit", "WarmupInput",
           "npy_bytes", "npy_array", "checksum", "SCHEMA_VERSION", "MIGRATIONS"]

# 2: the ledger's content column is `digest` (was `sha256`), in the algorithm the meta
#    key `digest_algorithm` records (a version-1 store's is SHA-256).
# 3: alert notifications and the drift state in the alert words of daemon/state/store_words.py
#    (raised/cleared, X.733 severities, the baseline).
# 4: each checkpoint array, and each checkpoint's meta and extra JSON, carries a checksum
#    verified when it is loaded.
# 5: the attempts table (inputs being processed, and how many processes ended while
#    processing them).
SCHEMA_VERSION = 5

_SCHEMA = """
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
                   (_json_checksum(meta, extra), version))
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


def checksum(data: bytes) -> str:
    """BLAKE2b-128 of ``data`` in hex: a stored checkpoint part is checked against it."""
    return hashlib.blake2b(data, digest_size=16).hexdigest()


def _json_checksum(meta: str, extra: str) -> str:
    return checksum(meta.encode() + b"\0" + extra.encode())


# .npy headers by (dtype, shape): a checkpoint stores the same dozen arrays every time.
_NPY_HEADERS: dict[tuple[str, tuple], bytes] = {}


def npy_bytes(array: np.ndarray) -> bytes:
    """``array`` as the bytes ``np.save`` writes (format 1.0), without pickle.

    A C-ordered numeric array is written as its cached header plus its raw bytes
    (byte-identical to ``np.save``, and about a hundred times quicker for the small
    arrays of a checkpoint); anything else goes through ``np.save``.
    """
    a = np.asarray(array)
    if a.dtype.hasobject or a.dtype.names is not None or not a.flags.c_contiguous:
        buf = io.BytesIO()
        np.save(buf, a, allow_pickle=False)
        return buf.getvalue()
    key = (a.dtype.str, a.shape)
    header = _NPY_HEADERS.get(key)
    if header is None:
        buf = io.BytesIO()
        np.lib.format.write_array_header_1_0(buf, np.lib.format.header_data_from_array_1_0(a))
        header = buf.getvalue()
        if len(_NPY_HEADERS) >= 256:
            _NPY_HEADERS.clear()
        _NPY_HEADERS[key] = header
    return header + a.tobytes()


def npy_array(blob: bytes) -> np.ndarray:
    return np.load(io.BytesIO(blob), allow_pickle=False)


@dataclass(frozen=True)
class LedgerEntry:
    digest: str | None   # of the input's content, in the store's digest_algorithm
    name: str
    size: int
    outcome: str
    rows: int | None = None
    rows_invalid: int | None = None
    reason: str | None = None
    labels: str | None = None
    model_version: int | None = None
    seen_at: float = 0.0
    finished_at: float = 0.0
    id: int | None = None


@dataclass
class Checkpoint:
    version: int
    arrays: dict[str, np.ndarray]
    meta: dict[str, Any]
    extra: dict[str, Any]
    created: float = 0.0


@dataclass(frozen=True)
class HistoryRow:
    segment: int
    weight: float
    rows: int
    mean: list
    spread: list
    drift: Mapping[str, Any] | None = None
    event: str | None = None


@dataclass(frozen=True)
class WarmupInput:
    """An input committed before the first model: its labels file (segments still
    null), its valid rows in the data's units, and which of its rows they are (None for
    an input buffered before the store kept that)."""
    labels: str | None
    rows: np.ndarray
    valid: np.ndarray | None
    learned: bool = True   # False: a duplicate, labelled but not learned from


@dataclass
class InputCommit:
    """Everything one input changes in the store (the arguments of ``commit_input``).

    ``learned``: the input advances the model version by one (a new input); a
    duplicate does not. ``checkpoint.version``, when given, must be the version
    after this input. ``alerts`` go to the outbox (an id already there is kept as
    it was); ``rebaseline`` is a request id applied by this input; ``attempt`` the
    input's attempt key (:meth:`StateStore.attempts`), cleared by the commit.
    """
    entry: LedgerEntry
    learned: bool
    checkpoint: Checkpoint | None = None
    warmup_rows: np.ndarray | None = None
    warmup_valid: np.ndarray | None = None
    # a duplicate taken before the first model: its valid rows and which rows they are,
    # kept to label it once the model exists (not learned from)
    duplicate_rows: tuple[np.ndarray, np.ndarray] | None = None
    clear_warmup: bool = False
    history: Iterable[HistoryRow] = ()
    alerts: Iterable[tuple[str, Mapping[str, Any]]] = ()
    rebaseline: int | None = None
    attempt: str | None = None
    labels_schema: str | None = None   # the stream's pass-through types, fixed by this input


# Attempt rows of inputs that never finished here (gone from the inbox meanwhile) are
# dropped after this long.
_ATTEMPTS_KEPT_SECONDS = 7 * 86400


class StateStore:
    """Access to ``state.db``. One instance per process; not shared across threads."""

    def __init__(self, path: Path, checkpoints_kept: int = 20, clock=time.time, *,
                 used_evidence: Callable[[], str | None] | None = None):
        """Open (or make) the store at ``path``.

        ``used_evidence`` says what shows that the state folder was used before (labels
        in the outbox, inputs in ``processed/``), for a folder made before the marker
        existed (:mod:`shoal.daemon.state.marker`): a missing or empty store in a used folder
        is refused rather than made afresh.
        """
        self.path = Path(path)
        self.checkpoints_kept = checkpoints_kept
        self.clock = clock
        self._marker: MarkerWriter | None = None
        marker = read_marker(self.path)

        def evidence() -> str | None:
            if marker is not None:
                return f"its marker {marker.path.name} (written when the store was made)"
            return used_evidence() if used_evidence is not None else None

        if not self.path.exists() or self.path.stat().st_size == 0:
            self._refuse_if_used(evidence(), "is missing" if not self.path.exists()
                                 else "is empty (0 bytes)")
        try:
            self.db = sqlite3.connect(self.path, isolation_level=None, timeout=30.0,
                                      check_same_thread=False)
            self.db.execute("PRAGMA journal_mode=WAL")
            self.db.execute("PRAGMA synchronous=FULL")
            self.db.execute("PRAGMA foreign_keys=ON")
            with self._transaction():
                found = self._schema_version()
                if found is None:
                    self._refuse_if_used(evidence(), "holds no tables")
                migrated = self._migrate(found) if found is not None else None
                for statement in _SCHEMA.split(";"):
                    if statement.strip():
                        self.db.execute(statement)
                if found is None:   # a new store
                    self._set_meta("schema_version", str(SCHEMA_VERSION))
                    self._set_meta("model_version", "0")
                    self._set_meta("digest_algorithm", NEW_STORE_ALGORITHM)
                if self._meta("store_id") is None:   # new, or made before the marker
                    self._set_meta("store_id", new_store_id())
                algorithm = self._meta("digest_algorithm") or UNRECORDED_ALGORITHM
                if algorithm not in DIGEST_ALGORITHMS:
                    raise StateError(
                        f"state store {self.path} records its inputs' content digests as "
                        f"{algorithm!r}, which this shoal does not compute (it computes "
                        f"{', '.join(DIGEST_ALGORITHMS)}); open it with the shoal that made "
                        "it, or start a new state folder")
            self._check_marker(marker)
        except sqlite3.DatabaseError as exc:
            self._close_after_failure()
            raise StateError(f"state store {self.path} cannot be used: {exc}") from exc
        except (StateError, OSError) as exc:
            self._close_after_failure()
            if isinstance(exc, OSError):
                raise StateError(f"state marker beside {self.path} cannot be used: "
                                 f"{exc}") from exc
            raise
        if migrated:
            log_event("state_store_migrated", store=str(self.path), from_version=found,
                      to_version=SCHEMA_VERSION, digest_algorithm=algorithm)

    def _refuse_if_used(self, evidence: str | None, what: str) -> None:
        if evidence is None:
            return
        raise StateError(
            f"state store {self.path} {what}, but this state folder has been used "
            f"({evidence}): the store was lost or emptied, and a new one would learn "
            "again what was committed. Restore state.db (with state.db-wal, if it was "
            "kept) from a backup; or, to start a new model from nothing on purpose, "
            "move the state folder aside (and the outbox's labels files, which the new "
            "model would not match) and start again")

    def _check_marker(self, marker) -> None:
        """Refuse a store behind its marker (rolled back, replaced); make a missing marker."""
        store_id = self._meta("store_id")
        rows, version = self._ledger_rows(), self.model_version
        if marker is None:
            marker = create_marker(self.path, store_id, rows, version)
            if marker is None:
                return
        advice = ("Restore the store that belongs here (with its state.db-wal, if it "
                  "was kept) from a backup; or, to go on from this store on purpose "
                  "(inputs committed after it are not learned again unless dropped "
                  f"again), delete {marker.path}")
        if marker.store_id is None:
            raise StateError(f"state marker {marker.path} is damaged (no store id): "
                             f"it cannot vouch for {self.path}. {advice}")
        if marker.store_id != store_id:
            raise StateError(
                f"state store {self.path} is not the store this state folder was made with "
                f"(store id {store_id}; the folder's marker says {marker.store_id}): it was "
                f"replaced. {advice}")
        if marker.ledger_rows is None:
            log_event("state_marker_unreadable", logging.WARNING, marker=str(marker.path),
                      detail="its counters cannot be read; the roll-back check is skipped "
                             "this time")
        elif rows < marker.ledger_rows or version < marker.model_version:
            raise StateError(
                f"state store {self.path} was rolled back: it holds {rows} ledger rows and "
                f"model version {version}, but {marker.ledger_rows} ledger rows and model "
                f"version {marker.model_version} had been committed (state.db-wal deleted "
                f"after a crash, or an older copy of state.db restored). {advice}")
        self._marker = MarkerWriter(self.path)   # a bad record is rewritten at the next commit

    def _ledger_rows(self) -> int:
        return int(self.db.execute("SELECT COALESCE(MAX(id), 0) FROM ledger").fetchone()[0])

    def _note_progress(self) -> None:
        """After a commit: the marker's counters follow the store (see shoal.daemon.state.marker)."""
        if self._marker is not None:
            self._marker.note(self._ledger_rows(), self.model_version)

    def _close_after_failure(self) -> None:
        if getattr(self, "_marker", None) is not None:
            self._marker.close()
        db = getattr(self, "db", None)
        if db is not None:
            with contextlib.suppress(sqlite3.Error):
                db.close()

    def _schema_version(self) -> int | None:
        """The stored schema version; None for a new (empty) store."""
        if self.db.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' AND "
                           "name = 'meta'").fetchone() is None:
            return None
        found = self._meta("schema_version")
        return None if found is None else int(found)

    def _migrate(self, found: int) -> bool:
        """Bring a store of schema version ``found`` to :data:`SCHEMA_VERSION` inside the
        opening transaction (a failure leaves the store as it was); True if it changed."""
        if found > SCHEMA_VERSION:
            raise StateError(f"state store {self.path} has schema version {found}; "
                             f"this shoal reads versions up to {SCHEMA_VERSION}")
        if found < min(MIGRATIONS):
            raise StateError(f"state store {self.path} has schema version {found}, which "
                             f"this shoal cannot migrate (it migrates versions "
                             f"{min(MIGRATIONS)} to {SCHEMA_VERSION - 1})")
        for version in range(found, SCHEMA_VERSION):
            MIGRATIONS[version](self.db)
        if found == SCHEMA_VERSION:
            return False
        self._set_meta("schema_version", str(SCHEMA_VERSION))
        return True

    # -- plumbing -------------------------------------------------------------
    def _transaction(self):
        store = self

        class _Tx:
            def __enter__(self):
                store.db.execute("BEGIN IMMEDIATE")

            def __exit__(self, exc_type, exc, tb):
                if exc_type is None:
                    try:
                        store.db.execute("COMMIT")
                    except sqlite3.Error:  # disk full, I/O error: leave no open transaction
                        if store.db.in_transaction:
                            store.db.execute("ROLLBACK")
                        raise
                elif store.db.in_transaction:
                    store.db.execute("ROLLBACK")
                return False

        return _Tx()

    def _meta(self, key: str) -> str | None:
        row = self.db.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        return None if row is None else row[0]

    def _set_meta(self, key: str, value: str) -> None:
        self.db.execute("INSERT INTO meta (key, value) VALUES (?, ?) "
                        "ON CONFLICT (key) DO UPDATE SET value = excluded.value", (key, value))

    def close(self) -> None:
        if getattr(self, "_marker", None) is not None:
            self._marker.close()
        self.db.close()

    # -- reads ------------------------------------------------------------------
    @property
    def model_version(self) -> int:
        return int(self._meta("model_version") or 0)

    @property
    def digest_algorithm(self) -> str:
        """The algorithm of the ledger's content digests (``blake3`` for a store made by
        this version, ``sha256`` for one made before the record existed)."""
        return check_algorithm(self._meta("digest_algorithm") or UNRECORDED_ALGORITHM)

    def find_done(self, digest: str) -> list[LedgerEntry]:
        """Committed or duplicate inputs with this content digest, oldest first."""
        rows = self.db.execute(
            "SELECT * FROM ledger WHERE digest = ? AND outcome IN ('committed', 'duplicate') "
            "ORDER BY id", (digest,)).fetchall()
        return [self._entry(r) for r in rows]

    def ledger(self, outcome: str | None = None) -> list[LedgerEntry]:
        sql = "SELECT * FROM ledger"
        args: tuple = ()
        if outcome is not None:
            sql += " WHERE outcome = ?"
            args = (outcome,)
        return [self._entry(r) for r in self.db.execute(sql + " ORDER BY id", args)]

    def _entry(self, row) -> LedgerEntry:
        (id_, digest, name, size, rows, bad, outcome, reason, labels, version, seen,
         finished) = row
        return LedgerEntry(digest=digest, name=name, size=size, rows=rows, rows_invalid=bad,
                           outcome=outcome, reason=reason, labels=labels,
                           model_version=version, seen_at=seen, finished_at=finished, id=id_)

    def latest_checkpoint(self) -> Checkpoint | None:
        row = self.db.execute("SELECT version FROM checkpoints ORDER BY version DESC "
                              "LIMIT 1").fetchone()
        return None if row is None else self.checkpoint(row[0])

    def checkpoint(self, version: int) -> Checkpoint:
        """Checkpoint ``version``, each part checked against its checksum: a damaged one is
        a :class:`StateError` (the state cannot be used), never a wrong model."""
        has_sums = "checksum" in {r[1] for r in self.db.execute(
            "PRAGMA table_info(checkpoints)")}   # a read-only reader of an older store
        row = self.db.execute(
            "SELECT created, meta, extra" + (", checksum" if has_sums else ", NULL") +
            " FROM checkpoints WHERE version = ?", (version,)).fetchone()
        if row is None:
            raise StateError(f"state store {self.path} has no checkpoint {version}")
        created, meta_text, extra_text, json_sum = row
        damaged = f"checkpoint {version} in {self.path} is damaged"
        if json_sum is not None and _json_checksum(meta_text, extra_text) != json_sum:
            raise StateError(f"{damaged}: its meta or extra data fails its checksum; "
                             "restore the state folder from a backup")
        arrays = {}
        for name, blob, array_sum in self.db.execute(
                "SELECT name, npy" + (", checksum" if has_sums else ", NULL") +
                " FROM checkpoint_arrays WHERE version = ? ORDER BY name", (version,)):
            if array_sum is not None and checksum(blob) != array_sum:
                raise StateError(f"{damaged}: array {name!r} fails its checksum; restore "
                                 "the state folder from a backup")
            try:
                arrays[name] = npy_array(blob)
            except (ValueError, EOFError, OSError) as exc:   # pickled object arrays too
                raise StateError(f"{damaged}: array {name!r} is unreadable: {exc}") from exc
        try:
            meta, extra = json.loads(meta_text), json.loads(extra_text)
        except (ValueError, TypeError) as exc:
            raise StateError(f"{damaged}: its meta or extra data is not JSON: {exc}") from exc
        if not isinstance(meta, dict) or not isinstance(extra, dict):
            raise StateError(f"{damaged}: its meta and extra data are not JSON objects")
        return Checkpoint(version=version, arrays=arrays, meta=meta, extra=extra,
                          created=created)

    def model_contract(self) -> dict[str, Any] | None:
        """What defines the model (:mod:`shoal.daemon.model.contract`), as stored; None if none."""
        text = self._meta("model_contract")
        if text is None:
            return None
        try:
            contract = json.loads(text)
        except ValueError as exc:
            raise StateError(f"state store {self.path}: the stored model contract is not "
                             f"JSON: {exc}") from exc
        if not isinstance(contract, dict):
            raise StateError(f"state store {self.path}: the stored model contract is not a "
                             "JSON object")
        return contract

    def set_model_contract(self, contract: Mapping[str, Any]) -> None:
        with self._transaction():
            self._set_meta("model_contract", json.dumps(contract, sort_keys=True))

    def warmup_rows(self) -> np.ndarray | None:
        """The buffered warm-up rows in arrival order, or None when there are none."""
        blobs = [npy_array(b) for (b,) in self.db.execute(
            "SELECT npy FROM warmup ORDER BY ledger_id")]
        return np.concatenate(blobs, axis=0) if blobs else None

    def labels_schema(self) -> str | None:
        """The stream's pass-through types (:mod:`shoal.daemon.files.labels_schema`), once its
        first input is committed."""
        return self._meta("labels_schema")

    def warmup_inputs(self) -> list[WarmupInput]:
        """The inputs taken before the first model, in arrival order: their labels file,
        valid rows (in the warm-up buffer, or kept for a duplicate) and which of their
        rows those are."""
        rows = self.db.execute(
            "SELECT warmup.ledger_id, ledger.labels, warmup.npy, warmup_valid.npy, 1 "
            "FROM warmup JOIN ledger ON ledger.id = warmup.ledger_id "
            "LEFT JOIN warmup_valid ON warmup_valid.ledger_id = warmup.ledger_id "
            "UNION ALL SELECT d.ledger_id, ledger.labels, d.npy, d.valid, 0 "
            "FROM warmup_duplicates d JOIN ledger ON ledger.id = d.ledger_id "
            "ORDER BY 1").fetchall()
        return [WarmupInput(labels, npy_array(rows_npy),
                            None if valid is None else npy_array(valid), bool(learned))
                for _, labels, rows_npy, valid, learned in rows]

    def history(self, segment: int | None = None) -> list[dict[str, Any]]:
        sql = ("SELECT version, segment, weight, rows, mean, spread, drift, event, created "
               "FROM segment_history")
        args: tuple = ()
        if segment is not None:
            sql += " WHERE segment = ?"
            args = (segment,)
        out = []
        for v, s, w, n, mean, spread, drift, event, created in self.db.execute(
                sql + " ORDER BY version, segment", args):
            out.append({"version": v, "segment": s, "weight": w, "rows": n,
                        "mean": json.loads(mean), "spread": json.loads(spread),
                        "drift": json.loads(drift) if drift else None, "event": event,
                        "created": created})
        return out

    def segment_events(self) -> list[dict[str, Any]]:
        """History rows that record a lifecycle event (born, retired, merged), oldest first."""
        return [{"version": v, "segment": s, "weight": w, "mean": json.loads(mean),
                 "spread": json.loads(spread), "event": event, "created": created}
                for v, s, w, mean, spread, event, created in self.db.execute(
                    "SELECT version, segment, weight, mean, spread, event, created FROM "
                    "segment_history WHERE event IS NOT NULL ORDER BY version, segment")]

    def pending_alerts(self) -> list[tuple[str, dict]]:
        return [(i, json.loads(p)) for i, p in self.db.execute(
            "SELECT id, payload FROM alert_outbox WHERE delivered_at IS NULL "
            "ORDER BY version, rowid")]

    def alerts(self, since: float | None = None, version: int | None = None) -> list[dict]:
        """Every alert notification (outbox row), oldest first: id, version, created,
        delivered_at and the payload."""
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
                for i, v, c, d, p in self.db.execute(sql + " ORDER BY version, rowid", args)]

    # -- alert delivery (the sender's own connection) ----------------------------
    def deliveries_due(self, sinks: list[str], now: float, limit: int = 100):
        """Undelivered (notification, sink, attempts, payload text) due by ``now``, oldest
        first; a missing delivery row counts as due with no attempts. Each sink gets its
        notifications in order: one waiting for its retry holds back the later ones."""
        out = []
        waiting: set[str] = set()
        rows = self.db.execute("SELECT id, payload FROM alert_outbox WHERE delivered_at IS NULL "
                               "ORDER BY version, rowid LIMIT ?", (limit,)).fetchall()
        for outbox_id, payload in rows:
            for sink in sinks:
                if sink in waiting:
                    continue
                row = self.db.execute("SELECT delivered_at, attempts, next_at FROM "
                                      "alert_delivery WHERE outbox_id = ? AND sink = ?",
                                      (outbox_id, sink)).fetchone()
                if row is None:
                    out.append((outbox_id, sink, 0, payload))
                elif row[0] is None and (row[2] is None or row[2] <= now):
                    out.append((outbox_id, sink, row[1], payload))
                elif row[0] is None:
                    waiting.add(sink)
        return out

    def next_delivery_at(self) -> float | None:
        row = self.db.execute("SELECT MIN(d.next_at) FROM alert_delivery d JOIN alert_outbox o "
                              "ON o.id = d.outbox_id WHERE d.delivered_at IS NULL "
                              "AND o.delivered_at IS NULL").fetchone()
        return row[0]

    def record_delivery(self, outbox_id: str, sink: str, *, ok: bool, attempts: int,
                        next_at: float | None = None, error: str | None = None,
                        sinks: list[str] = ()) -> None:
        """Note one attempt; the notification is delivered once every sink in ``sinks`` has it."""
        now = self.clock()
        with self._transaction():
            self.db.execute(
                "INSERT INTO alert_delivery (outbox_id, sink, delivered_at, attempts, next_at, "
                "last_error) VALUES (?, ?, ?, ?, ?, ?) ON CONFLICT (outbox_id, sink) DO UPDATE "
                "SET delivered_at = excluded.delivered_at, attempts = excluded.attempts, "
                "next_at = excluded.next_at, last_error = excluded.last_error",
                (outbox_id, sink, now if ok else None, attempts, next_at, error))
            self.db.execute("UPDATE alert_outbox SET attempts = attempts + 1 WHERE id = ?",
                            (outbox_id,))
            if ok:
                marks = "?" + ", ?" * (len(sinks) - 1) if sinks else "''"
                done = self.db.execute(
                    f"SELECT COUNT(*) FROM alert_delivery WHERE outbox_id = ? AND "
                    f"delivered_at IS NOT NULL AND sink IN ({marks})",
                    (outbox_id, *sinks)).fetchone()[0]
                if done >= len(sinks):
                    self.db.execute("UPDATE alert_outbox SET delivered_at = ? WHERE id = ?",
                                    (now, outbox_id))

    def retry_undelivered_now(self) -> int:
        """Make every undelivered notification due at once (at a start: deliveries that gave up
        are tried again)."""
        with self._transaction():
            return self.db.execute("UPDATE alert_delivery SET next_at = NULL, attempts = 0 "
                                   "WHERE delivered_at IS NULL").rowcount

    # -- re-baselining -------------------------------------------------------------
    def request_rebaseline(self, note: str) -> int:
        with self._transaction():
            cur = self.db.execute("INSERT INTO rebaselines (requested, note) VALUES (?, ?)",
                                  (self.clock(), note))
            return int(cur.lastrowid)

    def cancel_rebaseline(self, request_id: int) -> None:
        with self._transaction():
            self.db.execute("DELETE FROM rebaselines WHERE id = ? AND applied IS NULL",
                            (request_id,))

    def pending_rebaseline(self) -> tuple[int, str] | None:
        """The oldest request not yet applied, as (id, note)."""
        row = self.db.execute("SELECT id, note FROM rebaselines WHERE applied IS NULL "
                              "ORDER BY id LIMIT 1").fetchone()
        return None if row is None else (int(row[0]), row[1])

    def rebaselines(self) -> list[dict]:
        return [{"id": i, "requested": r, "note": n, "applied": a, "model_version": v}
                for i, r, n, a, v in self.db.execute(
                    "SELECT id, requested, note, applied, model_version FROM rebaselines "
                    "ORDER BY id")]

    def apply_rebaseline(self, request_id: int, version: int, extra: Mapping[str, Any],
                         alerts: Iterable[tuple[str, Mapping[str, Any]]] = ()) -> None:
        """Apply a re-baseline to checkpoint ``version`` (the latest) in one transaction:
        its extras (the drift state) replaced, the request marked, cleared alerts queued."""
        now = self.clock()
        with self._transaction():
            if self.model_version != version:
                raise StateError(f"the model moved on to version {self.model_version} while "
                                 f"re-baselining version {version}; try again")
            meta_text = self.db.execute("SELECT meta FROM checkpoints WHERE version = ?",
                                        (version,)).fetchone()[0]
            extra_text = json.dumps(extra, sort_keys=True)
            self.db.execute("UPDATE checkpoints SET extra = ?, checksum = ? WHERE version = ?",
                            (extra_text, _json_checksum(meta_text, extra_text), version))
            self._mark_rebaseline(request_id, version, now)
            self._insert_alerts(alerts, version, now)

    def _mark_rebaseline(self, request_id: int, version: int, now: float) -> None:
        self.db.execute("UPDATE rebaselines SET applied = ?, model_version = ? WHERE id = ?",
                        (now, version, request_id))

    def _insert_history(self, history, version, now) -> None:
        """Segment history rows of one model version (inside the caller's transaction)."""
        for h in history:
            self.db.execute(
                "INSERT INTO segment_history (version, segment, weight, rows, mean, spread, "
                "drift, event, created) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (version, int(h.segment), float(h.weight), int(h.rows), json.dumps(h.mean),
                 json.dumps(h.spread), json.dumps(h.drift) if h.drift else None, h.event, now))

    def _insert_alerts(self, alerts, version: int, now: float) -> None:
        for alert_id, payload in alerts:
            self.db.execute("INSERT OR IGNORE INTO alert_outbox (id, version, created, "
                            "payload) VALUES (?, ?, ?, ?)",
                            (alert_id, version, now, json.dumps(payload, sort_keys=True)))

    # -- writes -----------------------------------------------------------------
    def attempts(self, keys: Iterable[str], add: int = 0) -> dict[str, int]:
        """How many times each input (by its attempt key) was taken without being finished
        (committed or quarantined), 0 for none; with ``add``, first that many more (or
        fewer: an attempt given up cleanly) for each, in one transaction. Recorded before
        the inputs are read, a process that dies while processing them leaves the count
        behind for the next one to see."""
        keys = list(keys)
        if add and keys:
            now = self.clock()
            # Written without an fsync (synchronous=NORMAL in WAL mode): in the OS's
            # cache the record outlives the process, which is what it is for; a power
            # cut may lose it, and with it one count of an input's deaths (~6 ms an
            # input saved here, against ~0.05 ms).
            self.db.execute("PRAGMA synchronous=NORMAL")
            try:
                with self._transaction():
                    self.db.executemany(
                        "INSERT INTO attempts (input, count, last_at) VALUES (?, ?, ?) ON "
                        "CONFLICT (input) DO UPDATE SET count = count + excluded.count, "
                        "last_at = excluded.last_at", [(k, add, now) for k in keys])
                    self.db.execute("DELETE FROM attempts WHERE count <= 0 OR last_at < ?",
                                    (now - _ATTEMPTS_KEPT_SECONDS,))
            finally:
                self.db.execute("PRAGMA synchronous=FULL")
        found = {}
        for i in range(0, len(keys), 500):
            part = keys[i:i + 500]
            found.update(self.db.execute(
                f"SELECT input, count FROM attempts WHERE input IN "
                f"({', '.join('?' * len(part))})", part).fetchall())
        return {k: int(found.get(k, 0)) for k in keys}

    def record_quarantine(self, entry: LedgerEntry, attempt: str | None = None) -> None:
        with self._transaction():
            self._insert_entry(entry)
            if attempt is not None:
                self.db.execute("DELETE FROM attempts WHERE input = ?", (attempt,))
        self._note_progress()

    def commit_input(self, entry: LedgerEntry, *, learned: bool,
                     checkpoint: Checkpoint | None = None,
                     warmup_rows: np.ndarray | None = None, clear_warmup: bool = False,
                     history: Iterable[HistoryRow] = (),
                     alerts: Iterable[tuple[str, Mapping[str, Any]]] = (),
                     rebaseline: int | None = None) -> int:
        """Commit one input in one transaction; return the model version after it.

        The arguments are those of :class:`InputCommit`.
        """
        return self.commit_inputs([InputCommit(
            entry, learned, checkpoint=checkpoint, warmup_rows=warmup_rows,
            clear_warmup=clear_warmup, history=history, alerts=alerts,
            rebaseline=rebaseline)])[0]

    def commit_inputs(self, commits: Iterable[InputCommit]) -> list[int]:
        """Commit several inputs, in order, in ONE transaction: all of them or none.

        Each gets its own ledger row, model version, history rows, alerts and
        warm-up rows exactly as :meth:`commit_input` would give it; only the
        checkpoints given are stored (a caller committing a group passes the
        last input's). Returns the model version after each input.
        """
        now = self.clock()
        versions = []
        with self._transaction():
            start = version = self.model_version
            for c in commits:
                version += 1 if c.learned else 0
                if c.checkpoint is not None and c.checkpoint.version != version:
                    raise StateError(f"checkpoint version {c.checkpoint.version} does not "
                                     f"follow model version {version - 1}")
                entry_id = self._insert_entry(c.entry, model_version=version)
                if c.warmup_rows is not None and len(c.warmup_rows):
                    self.db.execute("INSERT INTO warmup (ledger_id, npy) VALUES (?, ?)",
                                    (entry_id, npy_bytes(c.warmup_rows)))
                    if c.warmup_valid is not None:
                        self.db.execute("INSERT INTO warmup_valid (ledger_id, npy) VALUES "
                                        "(?, ?)", (entry_id, npy_bytes(c.warmup_valid)))
                if c.duplicate_rows is not None and len(c.duplicate_rows[0]):
                    self.db.execute("INSERT INTO warmup_duplicates (ledger_id, npy, valid) "
                                    "VALUES (?, ?, ?)", (entry_id,
                                                         npy_bytes(c.duplicate_rows[0]),
                                                         npy_bytes(c.duplicate_rows[1])))
                if c.clear_warmup:
                    self.db.execute("DELETE FROM warmup")
                    self.db.execute("DELETE FROM warmup_valid")
                    self.db.execute("DELETE FROM warmup_duplicates")
                if c.checkpoint is not None:
                    self._insert_checkpoint(c.checkpoint, now)
                self._insert_history(c.history, version, now)
                self._insert_alerts(c.alerts, version, now)
                if c.rebaseline is not None:
                    self._mark_rebaseline(c.rebaseline, version, now)
                if c.attempt is not None:
                    self.db.execute("DELETE FROM attempts WHERE input = ?", (c.attempt,))
                if c.labels_schema is not None:
                    self.db.execute("INSERT OR IGNORE INTO meta (key, value) VALUES "
                                    "('labels_schema', ?)", (c.labels_schema,))
                versions.append(version)
            if version != start:
                self._set_meta("model_version", str(version))
        self._note_progress()
        return versions

    def _insert_entry(self, e: LedgerEntry, model_version: int | None = None) -> int:
        cur = self.db.execute(
            "INSERT INTO ledger (digest, name, size, rows, rows_invalid, outcome, reason, "
            "labels, model_version, seen_at, finished_at) VALUES (?,?,?,?,?,?,?,?,?,?,?)",
            (e.digest, e.name, e.size, e.rows, e.rows_invalid, e.outcome, e.reason, e.labels,
             model_version if model_version is not None else e.model_version,
             e.seen_at, e.finished_at or self.clock()))
        return int(cur.lastrowid)

    def _insert_checkpoint(self, c: Checkpoint, now: float) -> None:
        meta_text = json.dumps(c.meta, sort_keys=True)
        extra_text = json.dumps(c.extra, sort_keys=True)
        self.db.execute("INSERT INTO checkpoints (version, created, meta, extra, checksum) "
                        "VALUES (?, ?, ?, ?, ?)",
                        (c.version, now, meta_text, extra_text,
                         _json_checksum(meta_text, extra_text)))
        for name, array in sorted(c.arrays.items()):
            if np.asarray(array).dtype == object:
                raise StateError(f"checkpoint array {name!r} has dtype object; only numeric "
                                 "arrays are stored")
            blob = npy_bytes(array)
            self.db.execute("INSERT INTO checkpoint_arrays (version, name, npy, checksum) "
                            "VALUES (?, ?, ?, ?)", (c.version, name, blob, checksum(blob)))
        self.db.execute("DELETE FROM checkpoints WHERE version <= ?",
                        (c.version - self.checkpoints_kept,))
