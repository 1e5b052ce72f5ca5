"""Quarantine: move a bad input aside with a sidecar JSON saying why.

The sidecar (``<name>.json`` beside the moved file in ``state/quarantine/``)
gives the reason code, the detail (line, column, limit ...), the original
name and the time. Inputs given on the command line (not in the inbox) are
left where they are; only the sidecar is written.
"""
from __future__ import annotations

import datetime as _dt
import json
import os
import shutil
from pathlib import Path
from typing import Any

from shoal.daemon.files.writer import atomic_file, display_name, fsync_dir, safe_stem

__all__ = ["quarantine", "free_name", "move_out"]


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
