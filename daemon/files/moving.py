"""Move an input out of the inbox: to ``processed/`` after its commit, or into
quarantine; under a free name, and only if the path still names the file that was read."""
from __future__ import annotations

import os
import shutil
from pathlib import Path

from shoal.daemon.files.writer import safe_stem

__all__ = ["free_name", "move_out"]


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
