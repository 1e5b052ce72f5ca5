"""Operators' names for segments: ``shoal name SEGMENT "text"`` (``--clear`` to remove).

A segment id never changes meaning, so a name is kept per id: the surviving id of a
merge keeps its name, an id that retires or is absorbed keeps its name in the
history, and a new id has none until someone names it. Names live in the state
store's ``meta`` table (no schema change): ``segment_names`` holds the current name
of each id with who set it, when and why; ``segment_name_history`` every change,
oldest first. Setting a name is one short transaction, so it works beside a
running service, which reads the names again for each input (alert payloads'
``segment_name``, and the labels files' ``segment_name`` column when
``output.segment_names`` is true).
"""
from __future__ import annotations

import getpass
import json
import sqlite3
import time
from typing import Any, Iterable, Mapping

import numpy as np
import pyarrow as pa

from shoal.daemon.errors import UsageError

__all__ = ["NAMES_KEY", "HISTORY_KEY", "segment_names", "name_records", "name_history",
           "set_segment_name", "with_segment_names", "name_alerts", "labelled",
           "add_name_command"]

NAMES_KEY = "segment_names"
HISTORY_KEY = "segment_name_history"
MAX_NAME = 64


def _meta_json(db, key: str, default):
    try:
        row = db.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
    except sqlite3.OperationalError:      # no meta table yet: a store never opened
        return default
    return default if row is None else json.loads(row[0])


def name_records(db) -> dict[int, dict[str, Any]]:
    """Segment id -> ``{"name", "by", "time", "note"}`` of every named segment."""
    return {int(k): v for k, v in _meta_json(db, NAMES_KEY, {}).items()}


def segment_names(db) -> dict[int, str]:
    """Segment id -> its name (named segments only)."""
    return {k: v["name"] for k, v in name_records(db).items()}


def name_history(db) -> list[dict[str, Any]]:
    return list(_meta_json(db, HISTORY_KEY, []))


def labelled(segment_id, names: Mapping[int, str]) -> str:
    """'segment 3 (defrost)' or 'segment 3'."""
    name = names.get(segment_id) if isinstance(segment_id, int) else None
    return f"segment {segment_id} ({name})" if name else f"segment {segment_id}"


def _known_segments(db) -> tuple[set[int], set[int]]:
    """(current ids from the latest history version, every id ever seen)."""
    ever = {int(s) for (s,) in db.execute("SELECT DISTINCT segment FROM segment_history")}
    row = db.execute("SELECT MAX(version) FROM segment_history WHERE event IS NULL "
                     "OR weight > 0").fetchone()
    current = set()
    if row[0] is not None:
        current = {int(s) for (s,) in db.execute(
            "SELECT segment FROM segment_history WHERE version = ? AND weight > 0", (row[0],))}
    return current, ever


def _check_name(text: str) -> str:
    name = " ".join(text.split())
    if not name:
        raise UsageError("a segment name must have at least one visible character "
                         "(use --clear to remove a name)")
    if len(name) > MAX_NAME:
        raise UsageError(f"a segment name is at most {MAX_NAME} characters, found "
                         f"{len(name)}")
    if any(ord(c) < 32 or c == "\x7f" for c in name):
        raise UsageError("a segment name cannot hold control characters")
    return name


def set_segment_name(db_path, segment: int, name: str | None, *, by: str | None = None,
                     note: str = "", now: float | None = None) -> dict[str, Any]:
    """Name ``segment`` (``name`` None: clear its name); returns the history record."""
    now = time.time() if now is None else now
    by = by or getpass.getuser()
    db = sqlite3.connect(db_path, timeout=30.0, isolation_level=None)
    try:
        db.execute("BEGIN IMMEDIATE")
        try:
            current, ever = _known_segments(db)
            if segment not in ever:
                raise UsageError(f"segment {segment} does not exist; the current segments "
                                 f"are {sorted(current) or 'none yet (warm-up)'}")
            records = name_records(db)
            if name is not None:
                name = _check_name(name)
                taken = [s for s, r in records.items() if r["name"] == name and s != segment
                         and s in current]
                if taken:
                    raise UsageError(f"segment {taken[0]} is already named {name!r}")
                records[segment] = {"name": name, "by": by, "time": now, "note": note}
            elif segment not in records:
                raise UsageError(f"segment {segment} has no name to clear")
            else:
                del records[segment]
            change = {"segment": segment, "name": name, "by": by, "time": now, "note": note}
            history = name_history(db) + [change]
            for key, value in ((NAMES_KEY, {str(k): v for k, v in sorted(records.items())}),
                               (HISTORY_KEY, history)):
                db.execute("INSERT INTO meta (key, value) VALUES (?, ?) ON CONFLICT (key) "
                           "DO UPDATE SET value = excluded.value", (key, json.dumps(value)))
            db.execute("COMMIT")
        except BaseException:
            db.execute("ROLLBACK")
            raise
    finally:
        db.close()
    return change


def with_segment_names(tables: Iterable[pa.Table], names: Mapping[int, str]):
    """Labels tables with a ``segment_name`` column after ``segment`` (null where the
    segment is null or has no name)."""
    for table in tables:
        segment = table.column("segment").to_numpy(zero_copy_only=False)
        ids = np.asarray(segment, dtype=float)
        out = [None if np.isnan(s) else names.get(int(s)) for s in ids]
        at = table.column_names.index("segment") + 1
        yield table.add_column(at, "segment_name", pa.array(out, type=pa.string()))


def name_alerts(alerts: list[tuple[str, Mapping[str, Any]]], names: Mapping[int, str]):
    """Alert payloads with ``segment_name`` (the segment's name, or null); copies, so
    the drift watch's own records are left as they were."""
    out = []
    for alert_id, payload in alerts:
        seg = payload.get("segment")
        if isinstance(seg, int) and not isinstance(seg, bool):
            payload = {**payload, "segment_name": names.get(seg)}
        out.append((alert_id, payload))
    return out


def add_name_command(cmd, with_config) -> None:
    sp = with_config(cmd("name", "give a segment a name that every view and alert shows "
                                 "(who, when and why are kept in the history)", _cmd_name))
    sp.add_argument("segment", type=int, metavar="SEGMENT", help="segment id")
    sp.add_argument("text", nargs="?", metavar="NAME", help='the name, e.g. "defrost"')
    sp.add_argument("--clear", action="store_true", help="remove the segment's name")
    sp.add_argument("--note", default="", help="why (kept in the history)")
    sp.add_argument("--by", default=None, help="who (default: the user running it)")
    sp.add_argument("--history", action="store_true",
                    help="print every naming of this segment instead")


def _cmd_name(args) -> int:
    from shoal.config import load_config
    from shoal.daemon.files.layout import Layout
    from shoal.daemon.runtime.logs import log_event, setup_logging

    settings = load_config(args.config)
    setup_logging(settings.log_level)
    layout = Layout.of(settings)
    if not layout.db.exists():
        raise UsageError(f"no state store at {layout.db} yet: nothing has been processed")
    if args.history:
        db = sqlite3.connect(f"file:{layout.db}?mode=ro", uri=True)
        try:
            for h in name_history(db):
                if h["segment"] == args.segment:
                    when = time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(h["time"]))
                    what = repr(h["name"]) if h["name"] is not None else "(cleared)"
                    print(f"{when}  {what}  by {h['by']}" + (f"  {h['note']}" if h["note"]
                                                               else ""))
        finally:
            db.close()
        return 0
    if args.clear == (args.text is not None):
        raise UsageError('give either a NAME or --clear: shoal name SEGMENT "text"')
    change = set_segment_name(layout.db, args.segment, None if args.clear else args.text,
                              by=args.by, note=args.note)
    log_event("segment_named", segment=args.segment, name=change["name"], by=change["by"])
    print(f"segment {args.segment}: " + (f"named {change['name']!r}" if change["name"]
                                         else "name cleared"))
    return 0
