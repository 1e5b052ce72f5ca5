"""Readiness gate: decide whether a path in the inbox may be read now.

A file is read only when it is complete: renamed into the inbox, or unchanged
in size and modification time for the settle time. A rename is known from a
move event, or, when the move came from outside the watched folder (reported
as a creation), from the file's change time being later than its modification
time: a rename (or ``utime``/``chmod`` after writing) leaves that mark, while
every write sets both times to the same instant. Parquet must
also end with its footer magic: a Parquet file begun without it is incomplete and
waits (``incomplete_seconds`` after its last change, at least the settle time),
then is passed on so that the reader quarantines it as truncated. Symlinks, FIFOs, devices and
folders are refused without being opened; names matching an ignore pattern
are skipped.
"""
from __future__ import annotations

import enum
import fnmatch
import os
import stat as stat_mod
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterable

from shoal.daemon.runtime.logs import log_event

__all__ = ["Verdict", "Decision", "ReadinessGate", "input_kind", "PARQUET_MAGIC"]

PARQUET_MAGIC = b"PAR1"
_TOLD_NAMES = 100_000   # ignored names remembered as logged (then no more are logged)
_KINDS = ((".csv.gz", "csv.gz"), (".csv", "csv"), (".tsv.gz", "tsv.gz"), (".tsv", "tsv"),
          (".parquet", "parquet"), (".pq", "parquet"))


def input_kind(name: str) -> str | None:
    """``'parquet'``, ``'csv'``, ``'csv.gz'``, ``'tsv'``, ``'tsv.gz'``, or None for an
    unsupported name."""
    low = name.lower()
    for suffix, kind in _KINDS:
        if low.endswith(suffix) and len(low) > len(suffix):
            return kind
    return None


class Verdict(enum.Enum):
    """What the gate says of a path: read it now, wait, skip it, refuse it, or it is gone."""
    READY = "ready"
    WAIT = "wait"
    IGNORE = "ignore"
    REFUSE = "refuse"
    GONE = "gone"


@dataclass(frozen=True)
class Decision:
    """A verdict on one path, with its reason, when to look again (for WAIT), and the
    modification time and size it was judged at."""
    verdict: Verdict
    reason: str = ""
    recheck_at: float | None = None  # monotonic time for WAIT
    mtime_ns: int = 0
    size: int = 0
    inode: int = 0
    incomplete: bool = False   # WAIT: a Parquet file past its settle time without a footer


@dataclass
class _Seen:
    size: int
    mtime_ns: int
    inode: int
    since: float
    renamed: bool


class ReadinessGate:
    """Tracks what each inbox path looked like and when it last changed.

    ``clock`` (monotonic seconds), ``wall`` (epoch seconds) and ``lstat`` are
    injectable for tests.
    """

    def __init__(self, settle_seconds: float, ignore: Iterable[str] = (), *,
                 incomplete_seconds: float = 600.0,
                 clock: Callable[[], float] = time.monotonic,
                 wall: Callable[[], float] = time.time,
                 lstat: Callable[[str | os.PathLike], os.stat_result] = os.lstat):
        self.settle = float(settle_seconds)
        self.incomplete = max(float(incomplete_seconds), self.settle)
        self.ignore = tuple(ignore)
        self.clock = clock
        self.wall = wall
        self.lstat = lstat
        self._seen: dict[str, _Seen] = {}
        self._told: set[str] = set()   # ignored names already logged

    def ignored(self, name: str) -> bool:
        return any(fnmatch.fnmatchcase(name, pattern) for pattern in self.ignore)

    def _say_ignored(self, name: str) -> None:
        """Log each ignored name once (``..csv`` matches ``.*``: a name that looks like
        an input should not vanish from view without a word)."""
        if name in self._told or len(self._told) >= _TOLD_NAMES:
            return
        self._told.add(name)
        pattern = next(p for p in self.ignore if fnmatch.fnmatchcase(name, p))
        log_event("input_ignored", file=os.fsencode(name).decode("utf-8", "backslashreplace"),
                  pattern=pattern, detail="the name matches watch.ignore; it is not read")

    def note_renamed(self, path: str | os.PathLike) -> None:
        """A move event put ``path`` into the inbox: it is complete as it stands."""
        try:
            st = self.lstat(path)
        except OSError:
            return
        self._seen[str(path)] = _Seen(st.st_size, st.st_mtime_ns, st.st_ino, self.clock(), True)

    def forget(self, path: str | os.PathLike) -> None:
        self._seen.pop(str(path), None)

    def check(self, path: str | os.PathLike) -> Decision:
        path = str(path)
        name = os.path.basename(path)
        if self.ignored(name):
            self._say_ignored(name)
            return Decision(Verdict.IGNORE, "name matches an ignore pattern")
        try:
            st = self.lstat(path)
        except FileNotFoundError:
            self.forget(path)
            return Decision(Verdict.GONE, "no longer exists")
        mode = st.st_mode
        if not stat_mod.S_ISREG(mode):
            kind = ("symlink" if stat_mod.S_ISLNK(mode) else "folder" if stat_mod.S_ISDIR(mode)
                    else "fifo" if stat_mod.S_ISFIFO(mode) else "socket"
                    if stat_mod.S_ISSOCK(mode) else "device")
            self.forget(path)
            return Decision(Verdict.REFUSE, f"not a regular file ({kind})", inode=st.st_ino)
        now = self.clock()
        seen = self._seen.get(path)
        same = (seen is not None and seen.size == st.st_size and seen.mtime_ns == st.st_mtime_ns
                and seen.inode == st.st_ino)
        if not same:
            seen = _Seen(st.st_size, st.st_mtime_ns, st.st_ino, now, renamed=False)
            self._seen[path] = seen
        # Quiet for the settle time: seen unchanged that long, or not modified that long.
        quiet_for = max(now - seen.since, self.wall() - st.st_mtime_ns / 1e9)
        settled = quiet_for >= self.settle
        facts = dict(mtime_ns=st.st_mtime_ns, size=st.st_size, inode=st.st_ino)
        renamed = seen.renamed or st.st_ctime_ns > st.st_mtime_ns
        if not (renamed or settled):
            wait = self.settle - quiet_for
            return Decision(Verdict.WAIT, "still changing", recheck_at=now + max(wait, 0.01),
                            **facts)
        if input_kind(name) == "parquet" and _parquet_incomplete(path):
            # incomplete, not bad: its writer may resume; quarantined as truncated once
            # unchanged for watch.incomplete_seconds
            if quiet_for < self.incomplete:
                at = now + max(min(self.incomplete - quiet_for, max(self.settle, 0.5)), 0.01)
                return Decision(Verdict.WAIT, "Parquet footer not written yet", recheck_at=at,
                                incomplete=True, **facts)
        return Decision(Verdict.READY, "renamed in" if renamed else "settled", **facts)


def _parquet_incomplete(path: str) -> bool:
    """A Parquet file begun (its leading magic, or nothing yet) whose footer magic is not
    written yet. A file without the leading magic is no Parquet file being written:
    not incomplete, so the reader refuses it at once."""
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | os.O_CLOEXEC)
    except OSError:
        return False
    try:
        size = os.fstat(fd).st_size
        head = os.pread(fd, 4, 0)
        if head != PARQUET_MAGIC[:len(head)]:
            return False
        return size < 12 or os.pread(fd, 4, size - 4) != PARQUET_MAGIC
    finally:
        os.close(fd)
