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
import shutil
from pathlib import Path
from typing import Any

from shoal.daemon.files.layout import Layout
from shoal.daemon.files.writer import atomic_file, display_name, fsync_dir, safe_stem

__all__ = ["quarantine", "free_name", "move_out", "read_sidecar", "quarantined",
           "quarantine_summary"]


def free_name(folder: Path, name: str) -> Path:
    """``folder/name``, or ``folder/<stem>.N<suffix>`` if taken (no sidecar clash either)."""
    if "/" in name or name in ("", ".", ".."):
        name = safe_stem(name)
    lower = name.lower()
    suffix = next((s for s in (".csv.gz", ".csv", ".parquet", ".pq") if lower.endswith(s)), "")
    stem = name[: len(name) - len(suffix)]
    for i in range(100000):
        candidate = folder / (name if i == 0 else f"{stem}.{i}{suffix}")
        if not os.path.lexists(candidate) and not os.path.lexists(f"{candidate}.json"):
            return candidate
    raise FileExistsError(f"no free name for {name} in {folder}")


def move_out(path: Path, folder: Path, target: Path | None = None,
             identity: tuple[int, int] | None = None) -> Path | None:
    """Move an inbox file into ``folder`` (free name); None if it was already gone, or if
    ``identity`` (device, inode: the file that was read) is given and ``path`` now names
    another file (renamed over it: a new input, left where it is).

    A hard link then an unlink, not a rename: the inbox watcher then sees a
    deletion, which it reports at once, instead of an unmatched move, which the
    inotify observer holds back for half a second (delaying every event behind it).
    """
    if identity is not None:
        try:
            st = os.lstat(path)
        except FileNotFoundError:
            return None
        if (st.st_dev, st.st_ino) != identity:
            return None
    target = target or free_name(folder, path.name)
    try:
        os.link(path, target, follow_symlinks=False)
    except FileNotFoundError:
        return None
    except OSError:  # another filesystem, or links not supported
        try:
            shutil.move(str(path), str(target))
        except FileNotFoundError:
            return None
        return target
    try:
        os.unlink(path)
    except FileNotFoundError:
        pass
    return target


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
