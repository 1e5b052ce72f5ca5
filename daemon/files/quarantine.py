"""Quarantine: move a bad input aside with a sidecar JSON saying why.

The sidecar (``<name>.json`` beside the moved file in ``state/quarantine/``)
gives the reason code, the detail (line, column, limit ...), the original
name and the time. Inputs given on the command line (not in the inbox) are
left where they are; only the sidecar is written. What the folder holds is read back
through :func:`read_sidecar` (:func:`quarantined`, :func:`quarantine_summary`), for
``shoal quarantine``, the status views and the metrics.
"""
from __future__ import annotations

import datetime as _dt
import json
import os
from pathlib import Path
from typing import Any

from shoal.daemon.files.layout import Layout
from shoal.daemon.files.moving import free_name, move_out
from shoal.daemon.files.writer import atomic_file, display_name, fsync_dir

__all__ = ["quarantine", "read_sidecar", "quarantined", "quarantine_summary"]


def quarantine(path: Path, folder: Path, reason: str, detail: str, *, move: bool,
               now: float, facts: dict[str, Any] | None = None) -> Path:
    """Write the sidecar, then (if ``move``) move ``path`` into ``folder``.

    Returns the path of the sidecar JSON.
    """
    name = path.name
    target = free_name(folder, name)
    sidecar = folder / f"{target.name}.json"
    record = {
        "reason": reason,
        "detail": detail,
        "input": display_name(name),
        "source": display_name(str(path)),
        "moved_to": display_name(str(target)) if move else None,
        "time": _dt.datetime.fromtimestamp(now, _dt.timezone.utc).isoformat(),
        **(facts or {}),
    }
    with atomic_file(sidecar, mode=0o600) as f:
        f.write(json.dumps(record, indent=2, ensure_ascii=False, default=str).encode())
    if move:
        move_out(path, folder, target)  # already gone: the sidecar still tells why
        fsync_dir(folder)
    return sidecar


def read_sidecar(path: Path) -> dict[str, Any] | None:
    """One sidecar as a flat record: ``name`` (the file in the quarantine folder),
    ``input`` (its original name), ``reason``, ``detail``, ``time`` (epoch seconds),
    ``size`` (bytes, None when the input was not moved here), ``file``, ``sidecar``,
    and every other field of the sidecar as it is. None if it cannot be read."""
    try:
        record = json.loads(Path(path).read_text("utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(record, dict):
        return None
    name = Path(path).name[:-len(".json")]
    data = Path(path).with_name(name)
    try:
        size = data.stat().st_size if data.is_file() else None
    except OSError:
        size = None
    try:
        stamp = _dt.datetime.fromisoformat(str(record.get("time"))).timestamp()
    except ValueError:
        try:
            stamp = Path(path).stat().st_mtime
        except OSError:
            return None
    original = str(record.get("input") or name)
    if "/" in original or original.startswith(".") or original in ("", ".."):
        original = name        # a name to put back into the inbox must be a plain one
    return {**record, "name": name, "input": original,
            "reason": record.get("reason", "unknown"), "detail": record.get("detail", ""),
            "time": stamp, "size": size, "file": data if size is not None else None,
            "sidecar": Path(path)}


def quarantined(layout: Layout) -> list[dict[str, Any]]:
    """Every input in quarantine (its sidecar readable), oldest first."""
    out = []
    try:
        names = sorted(os.listdir(layout.quarantine))
    except FileNotFoundError:
        return []
    for n in names:
        if n.endswith(".json") and not n.startswith("."):
            record = read_sidecar(layout.quarantine / n)
            if record is not None:
                out.append(record)
    out.sort(key=lambda r: (r["time"], r["name"]))
    return out


def quarantine_summary(layout: Layout) -> dict[str, Any]:
    """For status: how many inputs are in quarantine, by reason, and the latest."""
    entries = quarantined(layout)
    by_reason: dict[str, int] = {}
    for e in entries:
        by_reason[e["reason"]] = by_reason.get(e["reason"], 0) + 1
    latest = entries[-1] if entries else None
    return {"count": len(entries), "by_reason": by_reason,
            "latest": None if latest is None else {
                "name": latest["name"], "reason": latest["reason"],
                "detail": latest["detail"], "time": latest["time"]}}
