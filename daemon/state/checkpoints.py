"""Model checkpoints: the arrays, meta and extra data of each model version, checked.

A checkpoint is written in the transaction that commits its input, and only the last
``checkpoints_kept`` are kept. Every part carries a checksum (:mod:`.blobs`) that is
verified when the checkpoint is read, so a damaged store is a clear
:class:`~shoal.daemon.errors.StateError`, never a wrong model. The model's contract
(what defines it, :mod:`shoal.daemon.model.contract`) is kept in ``meta`` beside them.
"""
from __future__ import annotations

import json
import sqlite3
import uuid
from typing import Any

import numpy as np

from shoal.daemon.errors import StateError
from shoal.daemon.state.blobs import checksum, json_checksum, npy_array, npy_bytes
from shoal.daemon.state.records import Checkpoint

__all__ = ["insert_checkpoint", "extra_json", "latest_version", "read_checkpoint",
           "parse_contract", "replace_extra"]


def insert_checkpoint(db: sqlite3.Connection, c: Checkpoint, now: float, kept: int) -> None:
    """Store checkpoint ``c`` and drop those more than ``kept`` versions older (inside the
    caller's transaction). Object arrays are refused: they would need pickle."""
    meta_text = json.dumps(c.meta, sort_keys=True)
    extra_text = extra_json(c.extra)
    db.execute("INSERT INTO checkpoints (version, created, meta, extra, checksum) "
               "VALUES (?, ?, ?, ?, ?)",
               (c.version, now, meta_text, extra_text, json_checksum(meta_text, extra_text)))
    for name, array in sorted(c.arrays.items()):
        if np.asarray(array).dtype == object:
            raise StateError(f"checkpoint array {name!r} has dtype object; only numeric "
                             "arrays are stored")
        blob = npy_bytes(array)
        db.execute("INSERT INTO checkpoint_arrays (version, name, npy, checksum) "
                   "VALUES (?, ?, ?, ?)", (c.version, name, blob, checksum(blob)))
    db.execute("DELETE FROM checkpoints WHERE version <= ?", (c.version - kept,))


# stands in for the drift baseline while the rest of the extra data is encoded: NULs
# around a random id (should the rest hold it too, the plain encoding is used)
_BASELINE_PLACE = f"\u0000{uuid.uuid4().hex}\u0000"
_baseline_text: tuple[Any, str] = (None, "")   # the last baseline record and its JSON


def extra_json(extra: dict[str, Any]) -> str:
    """``json.dumps(extra, sort_keys=True)``, the drift baseline's text kept from one
    checkpoint to the next: the record is only ever replaced whole (never changed in
    place), most inputs commit the one the input before them did, and its covariances
    are most of the drift state's JSON."""
    global _baseline_text
    drift = extra.get("drift")
    baseline = drift.get("baseline") if isinstance(drift, dict) else None
    if not isinstance(baseline, dict):
        return json.dumps(extra, sort_keys=True)
    if _baseline_text[0] is not baseline:
        _baseline_text = (baseline, json.dumps(baseline, sort_keys=True))
    text = json.dumps(dict(extra, drift=dict(drift, baseline=_BASELINE_PLACE)), sort_keys=True)
    place = json.dumps(_BASELINE_PLACE)
    if text.count(place) != 1:
        return json.dumps(extra, sort_keys=True)
    return text.replace(place, _baseline_text[1])


def latest_version(db: sqlite3.Connection) -> int | None:
    """The version of the newest checkpoint, or None when there is none."""
    row = db.execute("SELECT version FROM checkpoints ORDER BY version DESC "
                     "LIMIT 1").fetchone()
    return None if row is None else row[0]


def read_checkpoint(db: sqlite3.Connection, version: int, path) -> Checkpoint:
    """Checkpoint ``version`` of the store at ``path``, each part checked against its
    checksum: a damaged one is a :class:`StateError`, never a wrong model."""
    has_sums = "checksum" in {r[1] for r in db.execute(
        "PRAGMA table_info(checkpoints)")}   # a read-only reader of an older store
    row = db.execute(
        "SELECT created, meta, extra" + (", checksum" if has_sums else ", NULL") +
        " FROM checkpoints WHERE version = ?", (version,)).fetchone()
    if row is None:
        raise StateError(f"state store {path} has no checkpoint {version}")
    created, meta_text, extra_text, json_sum = row
    damaged = f"checkpoint {version} in {path} is damaged"
    if json_sum is not None and json_checksum(meta_text, extra_text) != json_sum:
        raise StateError(f"{damaged}: its meta or extra data fails its checksum; "
                         "restore the state folder from a backup")
    arrays = {}
    for name, blob, array_sum in db.execute(
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


def replace_extra(db: sqlite3.Connection, version: int, extra: dict[str, Any]) -> None:
    """Replace checkpoint ``version``'s extra data (the drift state), with its checksum
    (inside the caller's transaction)."""
    meta_text = db.execute("SELECT meta FROM checkpoints WHERE version = ?",
                           (version,)).fetchone()[0]
    extra_text = extra_json(extra)
    db.execute("UPDATE checkpoints SET extra = ?, checksum = ? WHERE version = ?",
               (extra_text, json_checksum(meta_text, extra_text), version))


def parse_contract(text: str | None, path) -> dict[str, Any] | None:
    """The stored model contract of the store at ``path`` from its JSON text; None if none."""
    if text is None:
        return None
    try:
        contract = json.loads(text)
    except ValueError as exc:
        raise StateError(f"state store {path}: the stored model contract is not "
                         f"JSON: {exc}") from exc
    if not isinstance(contract, dict):
        raise StateError(f"state store {path}: the stored model contract is not a "
                         "JSON object")
    return contract
