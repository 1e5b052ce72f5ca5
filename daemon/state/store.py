"""The state store: one SQLite database (WAL, ``synchronous=FULL``) and its transactions.

:class:`StateStore` opens the store (migrating an older schema, checking the state
folder's marker so a lost or rolled-back store is refused) and owns every transaction
and the clock; the SQL of each part lives in a module named for it: :mod:`.schema`
(tables, version, migrations), :mod:`.ledger` (inputs and attempts),
:mod:`.checkpoints`, :mod:`.warmup_buffer`, :mod:`.segment_history`, :mod:`.outbox`
(alert notifications and their delivery) and :mod:`.rebaselines`, with the records in
:mod:`.records` and the array encoding in :mod:`.blobs`. :meth:`StateStore.commit_inputs`
writes everything one or more inputs change in ONE transaction (all of them or none):
the exactly-once rule of the design rests on it. The names other packages use are
re-exported here (``__all__``), so they import the store from one place.
"""
from __future__ import annotations

import contextlib
import json
import logging
import sqlite3
import time
from pathlib import Path
from typing import Any, Callable, Iterable, Mapping

import numpy as np

from shoal.daemon.errors import StateError
from shoal.daemon.files.digest import (
    DIGEST_ALGORITHMS,
    NEW_STORE_ALGORITHM,
    UNRECORDED_ALGORITHM,
    check_algorithm,
)
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.state import checkpoints as _checkpoints
from shoal.daemon.state import ledger as _ledger
from shoal.daemon.state import outbox as _outbox
from shoal.daemon.state import rebaselines as _rebaselines
from shoal.daemon.state import segment_history as _segment_history
from shoal.daemon.state import warmup_buffer as _warmup_buffer
from shoal.daemon.state.blobs import checksum, npy_array, npy_bytes
from shoal.daemon.state.marker import MarkerWriter, create_marker, new_store_id, read_marker
from shoal.daemon.state.records import (
    Checkpoint,
    HistoryRow,
    InputCommit,
    LedgerEntry,
    WarmupInput,
)
from shoal.daemon.state.schema import (
    MIGRATIONS,
    SCHEMA_VERSION,
    create_tables,
    migrate,
    read_meta,
    schema_version,
    write_meta,
)

__all__ = ["StateStore", "LedgerEntry", "Checkpoint", "HistoryRow", "InputCommit", "WarmupInput",
           "npy_bytes", "npy_array", "checksum", "SCHEMA_VERSION", "MIGRATIONS"]


class StateStore:
    """Access to ``state.db``: opening, transactions, and every read and write of the state.

    One instance per process, not shared across threads (the alert sender and the
    read-only views open their own). Each method is one transaction, or a read; the
    table modules it calls hold the SQL.
    """

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
                found = schema_version(self.db)
                if found is None:
                    self._refuse_if_used(evidence(), "holds no tables")
                migrated = migrate(self.db, found, self.path) if found is not None else None
                create_tables(self.db)
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
        return _ledger.ledger_rows(self.db)

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

    # -- plumbing -------------------------------------------------------------
    def transaction(self):
        """A context manager around one write transaction (``BEGIN IMMEDIATE``): committed
        when the block ends, rolled back when it raises or when the commit fails, so
        no transaction is left open. For writes composed outside this class (retention's
        pruning); the store's own methods each take one."""
        return self._transaction()

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
        return read_meta(self.db, key)

    def _set_meta(self, key: str, value: str) -> None:
        write_meta(self.db, key, value)

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
        return _ledger.find_done(self.db, digest)

    def ledger(self, outcome: str | None = None) -> list[LedgerEntry]:
        return _ledger.ledger_entries(self.db, outcome)

    def latest_checkpoint(self) -> Checkpoint | None:
        version = _checkpoints.latest_version(self.db)
        return None if version is None else self.checkpoint(version)

    def checkpoint(self, version: int) -> Checkpoint:
        """Checkpoint ``version``, each part checked against its checksum: a damaged one is
        a :class:`StateError` (the state cannot be used), never a wrong model."""
        return _checkpoints.read_checkpoint(self.db, version, self.path)

    def model_contract(self) -> dict[str, Any] | None:
        """What defines the model (:mod:`shoal.daemon.model.contract`), as stored; None if none."""
        return _checkpoints.parse_contract(self._meta("model_contract"), self.path)

    def set_model_contract(self, contract: Mapping[str, Any]) -> None:
        with self._transaction():
            self._set_meta("model_contract", json.dumps(contract, sort_keys=True))

    def warmup_rows(self) -> np.ndarray | None:
        """The buffered warm-up rows in arrival order, or None when there are none."""
        return _warmup_buffer.warmup_rows(self.db)

    def labels_schema(self) -> str | None:
        """The stream's pass-through types (:mod:`shoal.daemon.files.labels_schema`), once its
        first input is committed."""
        return self._meta("labels_schema")

    def warmup_inputs(self) -> list[WarmupInput]:
        """The inputs taken before the first model, in arrival order: their labels file,
        valid rows (in the warm-up buffer, or kept for a duplicate) and which of their
        rows those are."""
        return _warmup_buffer.warmup_inputs(self.db)

    def history(self, segment: int | None = None) -> list[dict[str, Any]]:
        return _segment_history.history_rows(self.db, segment)

    def segment_events(self) -> list[dict[str, Any]]:
        """History rows that record a lifecycle event (born, retired, merged), oldest first."""
        return _segment_history.segment_events(self.db)

    def pending_alerts(self) -> list[tuple[str, dict]]:
        return _outbox.pending_alerts(self.db)

    def alerts(self, since: float | None = None, version: int | None = None) -> list[dict]:
        """Every alert notification (outbox row), oldest first: id, version, created,
        delivered_at and the payload."""
        return _outbox.alert_rows(self.db, since, version)

    # -- alert delivery (the sender's own connection) ----------------------------
    def deliveries_due(self, sinks: list[str], now: float, limit: int = 100):
        """Undelivered (notification, sink, attempts, payload text) due by ``now``, oldest
        first; a missing delivery row counts as due with no attempts. Each sink gets its
        notifications in order: one waiting for its retry holds back the later ones."""
        return _outbox.deliveries_due(self.db, sinks, now, limit)

    def next_delivery_at(self) -> float | None:
        return _outbox.next_delivery_at(self.db)

    def record_delivery(self, outbox_id: str, sink: str, *, ok: bool, attempts: int,
                        next_at: float | None = None, error: str | None = None,
                        sinks: list[str] = ()) -> None:
        """Note one attempt; the notification is delivered once every sink in ``sinks`` has it."""
        now = self.clock()
        with self._transaction():
            _outbox.record_delivery(self.db, outbox_id, sink, ok=ok, attempts=attempts,
                                    next_at=next_at, error=error, sinks=sinks, now=now)

    def retry_undelivered_now(self) -> int:
        """Make every undelivered notification due at once (at a start: deliveries that gave up
        are tried again)."""
        with self._transaction():
            return _outbox.retry_undelivered_now(self.db)

    # -- re-baselining -------------------------------------------------------------
    def request_rebaseline(self, note: str) -> int:
        with self._transaction():
            return _rebaselines.request_rebaseline(self.db, note, self.clock())

    def cancel_rebaseline(self, request_id: int) -> None:
        with self._transaction():
            _rebaselines.cancel_rebaseline(self.db, request_id)

    def pending_rebaseline(self) -> tuple[int, str] | None:
        """The oldest request not yet applied, as (id, note)."""
        return _rebaselines.pending_rebaseline(self.db)

    def rebaselines(self) -> list[dict]:
        return _rebaselines.rebaseline_rows(self.db)

    def apply_rebaseline(self, request_id: int, version: int, extra: Mapping[str, Any],
                         alerts: Iterable[tuple[str, Mapping[str, Any]]] = ()) -> None:
        """Apply a re-baseline to checkpoint ``version`` (the latest) in one transaction:
        its extras (the drift state) replaced, the request marked, cleared alerts queued."""
        now = self.clock()
        with self._transaction():
            if self.model_version != version:
                raise StateError(f"the model moved on to version {self.model_version} while "
                                 f"re-baselining version {version}; try again")
            _checkpoints.replace_extra(self.db, version, extra)
            self._mark_rebaseline(request_id, version, now)
            self._insert_alerts(alerts, version, now)

    # -- writes inside a caller's transaction (also backfill's and retention's) ----------
    def _mark_rebaseline(self, request_id: int, version: int, now: float) -> None:
        _rebaselines.mark_rebaseline(self.db, request_id, version, now)

    def _insert_history(self, history, version, now) -> None:
        """Segment history rows of one model version (inside the caller's transaction)."""
        _segment_history.insert_history(self.db, history, version, now)

    def _insert_alerts(self, alerts, version: int, now: float) -> None:
        _outbox.insert_alerts(self.db, alerts, version, now)

    def _insert_entry(self, e: LedgerEntry, model_version: int | None = None) -> int:
        return _ledger.insert_entry(self.db, e, model_version, self.clock)

    def _insert_checkpoint(self, c: Checkpoint, now: float) -> None:
        _checkpoints.insert_checkpoint(self.db, c, now, self.checkpoints_kept)

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
            # cut may lose it, and with it one count of an input's deaths, a price worth
            # an fsync saved per input.
            self.db.execute("PRAGMA synchronous=NORMAL")
            try:
                with self._transaction():
                    _ledger.add_attempts(self.db, keys, add, now)
            finally:
                self.db.execute("PRAGMA synchronous=FULL")
        return _ledger.attempt_counts(self.db, keys)

    def record_quarantine(self, entry: LedgerEntry, attempt: str | None = None) -> None:
        with self._transaction():
            self._insert_entry(entry)
            if attempt is not None:
                _ledger.clear_attempt(self.db, attempt)
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

    def commit_many(self, entries: Iterable[tuple[LedgerEntry, bool]],
                    checkpoint: Checkpoint | None, history: Iterable[HistoryRow],
                    clear_warmup: bool, labels_schema: str | None = None) -> int:
        """Commit a history of inputs learned elsewhere (``shoal backfill``) in ONE
        transaction: every ledger row (``(entry, learned)``; a learned input advances the
        model version by one, a quarantined one records no version), one checkpoint at
        the version reached, its segment history, and the stream's labels schema if none
        is recorded yet. Returns the model version committed; a checkpoint whose version
        is not the one reached is refused (:class:`StateError`) and nothing is written."""
        now = self.clock()
        with self._transaction():
            version = self.model_version
            for entry, learned in entries:
                if entry.outcome == "quarantined":
                    self._insert_entry(entry)
                    continue
                version += 1 if learned else 0
                self._insert_entry(entry, model_version=version)
            if checkpoint is not None and checkpoint.version != version:
                raise StateError(f"checkpoint version {checkpoint.version} does not match "
                                 f"the ledger's {version}")
            self._set_meta("model_version", str(version))
            if clear_warmup:
                for table in ("warmup", "warmup_valid", "warmup_duplicates"):
                    self.db.execute(f"DELETE FROM {table}")
            if checkpoint is not None:
                self._insert_checkpoint(checkpoint, now)
            self._insert_history(list(history), version, now)
            if labels_schema is not None:
                self.db.execute("INSERT OR IGNORE INTO meta (key, value) VALUES "
                                "('labels_schema', ?)", (labels_schema,))
        return version

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
                _warmup_buffer.insert_warmup(self.db, entry_id, c)
                if c.clear_warmup:
                    _warmup_buffer.clear_warmup(self.db)
                if c.checkpoint is not None:
                    self._insert_checkpoint(c.checkpoint, now)
                self._insert_history(c.history, version, now)
                self._insert_alerts(c.alerts, version, now)
                if c.rebaseline is not None:
                    self._mark_rebaseline(c.rebaseline, version, now)
                if c.attempt is not None:
                    _ledger.clear_attempt(self.db, c.attempt)
                if c.labels_schema is not None:
                    self.db.execute("INSERT OR IGNORE INTO meta (key, value) VALUES "
                                    "('labels_schema', ?)", (c.labels_schema,))
                versions.append(version)
            if version != start:
                self._set_meta("model_version", str(version))
        self._note_progress()
        return versions
