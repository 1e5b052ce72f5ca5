"""Bring a store's alert words up to date: the migration that reads an old store.

Stores made before this vocabulary keep, in the alert outbox and in the drift state
of every checkpoint, the earlier words: the states ``firing`` / ``resolved`` (outbox ids
``<alert>.firing``, ``<alert>.resolved``), ``resolved_by``, ``fired_at``, the drift
snapshot as ``reference`` (``reference_number``, ``reference_info``, explanation fields
``reference_mean`` / ``current_mean``, ``reference_sd`` / ``current_sd``,
``reference_weight``, ``reference_log_density``, the unit "reference sds") and the
severities ``warning`` (drift) and ``info`` (segment events). :func:`migrate_alert_words`
rewrites all of it to the words of the ITU-T X.733 alarm model (raised, cleared;
critical, major, warning) and the baseline, inside the transaction that opens the
store, so a notification still waiting for delivery goes out in the new words. A payload
in the old words is told by its lack of ``schema_version``. The read-only readers
(``shoal status``, the status page, ``shoal report``) translate an old store's alerts
and drift state the same way when they read it, before any writer has migrated it.

This module is the one place that still spells the old words; nothing else reads them.
"""
from __future__ import annotations

import json
import re
import sqlite3

__all__ = ["migrate_alert_words", "payload_in_current_words", "extra_in_current_words",
           "notification_in_current_words", "PAYLOAD_SCHEMA_VERSION"]

# the payload schema the migrated notifications are brought to (daemon/segments/monitor.py's
# PAYLOAD_SCHEMA_VERSION at the time of this migration)
PAYLOAD_SCHEMA_VERSION = 1

_STATES = {"firing": "raised", "resolved": "cleared"}
_SEVERITIES = {"critical": "critical", "warning": "major", "info": "warning"}
_KEYS = {
    "resolved_by": "cleared_by",
    "fired_at": "raised_at",
    "reference": "baseline",
    "reference_number": "baseline_number",
    "reference_info": "baseline_info",
    "reference_mean": "baseline_mean",
    "current_mean": "window_mean",
    "reference_sd": "baseline_sd",
    "current_sd": "window_sd",
    "reference_weight": "baseline_weight",
    "reference_log_density": "baseline_log_density",
}
_UNITS = {"reference sds": "baseline sds"}
_WORD = re.compile(r"\breference\b")


def _renamed(node):
    """Every dict key of ``node`` (nested) in the new words; values are left alone."""
    if isinstance(node, dict):
        return {_KEYS.get(k, k): _renamed(v) for k, v in node.items()}
    if isinstance(node, list):
        return [_renamed(v) for v in node]
    return node


def payload_in_current_words(payload: dict) -> dict:
    """One notification's payload in the new words; a payload that carries a
    ``schema_version`` is already in them and comes back unchanged."""
    return payload if "schema_version" in payload else _payload(payload)


def extra_in_current_words(extra: dict) -> dict:
    """A checkpoint's extras with the drift state in the new words (a no-op on new ones)."""
    if isinstance(extra.get("drift"), dict):
        extra = dict(extra, drift=_drift_state(extra["drift"]))
    return extra


def _payload(payload: dict) -> dict:
    out = _renamed(payload)
    if out.get("status") in _STATES:
        out["status"] = _STATES[out["status"]]
    if out.get("severity") in _SEVERITIES:
        out["severity"] = _SEVERITIES[out["severity"]]
    if out.get("unit") in _UNITS:
        out["unit"] = _UNITS[out["unit"]]
    explanation = out.get("explanation")
    if isinstance(explanation, dict) and isinstance(explanation.get("summary"), str):
        explanation["summary"] = _WORD.sub("baseline", explanation["summary"])
    out.setdefault("schema_version", PAYLOAD_SCHEMA_VERSION)
    return out


def notification_in_current_words(old: str) -> str:
    """An outbox id ``<alert>.<state>`` with the state in the new words."""
    head, dot, state = old.rpartition(".")
    return f"{head}.{_STATES[state]}" if dot and state in _STATES else old


def _drift_state(state: dict) -> dict:
    """The drift watch's state (checkpoint ``extra["drift"]``) in the new words."""
    out = {_KEYS.get(k, k): v for k, v in state.items()}
    bounds = out.get("bounds")
    if isinstance(bounds, dict) and isinstance(bounds.get("entries"), dict):
        for stats in bounds["entries"].values():
            for stat, entry in list(stats.items()):
                entry = _renamed(entry)
                if entry.get("status") in _STATES:
                    entry["status"] = _STATES[entry["status"]]
                stats[stat] = entry
    if isinstance(out.get("open"), dict):
        for alert in out["open"].values():
            if isinstance(alert, dict) and isinstance(alert.get("payload"), dict):
                alert["payload"] = payload_in_current_words(alert["payload"])
    return out


def migrate_alert_words(db: sqlite3.Connection) -> None:
    """Rewrite the alert outbox, its delivery rows and every checkpoint's drift state in
    the new words (inside the caller's transaction: all of it or none)."""
    # The outbox id is the key its delivery rows point at: check the pair at the commit.
    db.execute("PRAGMA defer_foreign_keys = ON")
    rows = db.execute("SELECT id, payload FROM alert_outbox ORDER BY rowid").fetchall()
    for old_id, text in rows:
        new_id = notification_in_current_words(old_id)
        payload = json.dumps(payload_in_current_words(json.loads(text)), sort_keys=True)
        db.execute("UPDATE alert_outbox SET id = ?, payload = ? WHERE id = ?",
                   (new_id, payload, old_id))
        if new_id != old_id:
            db.execute("UPDATE alert_delivery SET outbox_id = ? WHERE outbox_id = ?",
                       (new_id, old_id))
    for version, text in db.execute("SELECT version, extra FROM checkpoints").fetchall():
        db.execute("UPDATE checkpoints SET extra = ? WHERE version = ?",
                   (json.dumps(extra_in_current_words(json.loads(text)), sort_keys=True),
                    version))
