"""What retention has removed so far, as totals kept in the store's ``meta`` table:
ledger rows per outcome (``compacted_ledger``) and alert notifications per
status/severity (``compacted_notifications``). Written by :mod:`shoal.daemon.state.retention`,
read by the status, report and metrics views; kept apart so those views need not
import retention (which itself reads the state through them).
"""

from __future__ import annotations

import json

__all__ = ["COMPACTED_KEY", "COMPACTED_NOTIFICATIONS_KEY", "compacted_totals",
           "compacted_notifications", "add_ledger_totals"]

COMPACTED_KEY = "compacted_ledger"
COMPACTED_NOTIFICATIONS_KEY = "compacted_notifications"


def compacted_totals(db) -> dict[str, dict[str, int]]:
    """Ledger totals of the rows removed so far, per outcome."""
    row = db.execute("SELECT value FROM meta WHERE key = ?", (COMPACTED_KEY,)).fetchone()
    return json.loads(row[0]) if row else {}


def compacted_notifications(db) -> dict[str, int]:
    """Alert notifications removed so far, per 'status/severity'."""
    row = db.execute("SELECT value FROM meta WHERE key = ?",
                     (COMPACTED_NOTIFICATIONS_KEY,)).fetchone()
    return json.loads(row[0]) if row else {}


def add_ledger_totals(totals: dict[str, dict[str, int]], grouped) -> dict[str, dict[str, int]]:
    """Add ledger rows grouped by outcome, as (outcome, inputs, rows, rows_invalid), to
    ``totals`` (outcome -> counts), in place; returns ``totals``."""
    for outcome, n, rows, bad in grouped:
        t = totals.setdefault(outcome, {"inputs": 0, "rows": 0, "rows_invalid": 0})
        t["inputs"] += n
        t["rows"] += rows
        t["rows_invalid"] += bad
    return totals
