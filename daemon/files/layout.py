"""The service's folders, their permissions, and the lock on the state folder.

:class:`Layout` names every folder and file of a configured service (inbox, outbox,
state, quarantine, processed, the store and its lock) in one place, so no other
module builds those paths itself. :func:`prepare_folders` makes or checks them with
clear errors, :class:`StateLock` keeps a second service off the same state, and
:func:`open_store` opens the store with what shows the folder was used before.
"""
from __future__ import annotations

import errno
import fcntl
import os
from dataclasses import dataclass
from pathlib import Path

from shoal.config import ConfigError, Settings
from shoal.daemon.errors import StateError
from shoal.daemon.state.store import StateStore

__all__ = ["Layout", "prepare_folders", "StateLock", "remove_stale_temps", "folder_use",
           "open_store"]

STATE_MODE = 0o700


@dataclass(frozen=True)
class Layout:
    """The paths of one service's folders and state files, derived from its settings."""
    inbox: Path
    outbox: Path
    state: Path
    quarantine: Path
    processed: Path
    db: Path
    lock: Path

    @classmethod
    def of(cls, settings: Settings) -> "Layout":
        state = settings.state
        return cls(inbox=settings.inbox, outbox=settings.outbox, state=state,
                   quarantine=state / "quarantine", processed=state / "processed",
                   db=state / "state.db", lock=state / "lock")


def _ensure_dir(path: Path, key: str, mode: int | None) -> None:
    """Make ``path`` if missing (with ``mode``, whatever the umask) and check it is a
    writable folder. A folder that exists keeps its mode: an operator's choice, and
    possibly shared (shoal sets modes only on folders it makes)."""
    made = False
    try:
        if not path.is_dir():
            path.parent.mkdir(parents=True, exist_ok=True)
            try:
                path.mkdir(mode=mode or 0o777)
                made = True
            except FileExistsError:
                pass   # made meanwhile by another, or not a folder (found out below)
    except OSError as exc:
        raise ConfigError(f"{key}: expected a folder that exists or can be created, "
                          f"found {path} ({exc.strerror})") from exc
    if path.is_symlink() or not path.is_dir():
        raise ConfigError(f"{key}: expected a folder, found {path} which is not a folder")
    # a state folder that exists but cannot be written is unusable (exit 3); the read-only
    # commands (segments, alerts, status, label) do not come here
    unusable = StateError if key == "state" else ConfigError
    if mode is not None and made:
        try:
            os.chmod(path, mode)
        except OSError as exc:
            raise unusable(f"{key}: cannot set permissions of {path}: {exc.strerror} (a "
                           "writable state folder is needed to learn; segments, alerts, "
                           "status and label only read it)") from exc
    probe = path / f".shoal-write-probe-{os.getpid()}"
    try:
        fd = os.open(probe, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise unusable(f"{key}: expected a writable folder, found {path} not writable "
                       f"({exc.strerror})") from exc


def prepare_folders(settings: Settings) -> Layout:
    """Create the folders if needed and check they are writable (state: mode 0700)."""
    layout = Layout.of(settings)
    _ensure_dir(layout.inbox, "inbox", None)
    _ensure_dir(layout.outbox, "outbox", None)
    _ensure_dir(layout.state, "state", STATE_MODE)
    _ensure_dir(layout.quarantine, "state", STATE_MODE)
    _ensure_dir(layout.processed, "state", STATE_MODE)
    return layout


class StateLock:
    """An exclusive ``flock`` on ``state/lock``: one process per state folder."""

    def __init__(self, path: Path):
        self.path = path
        self._fd: int | None = None

    def acquire(self) -> "StateLock":
        fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o600)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            holder = os.pread(fd, 32, 0).decode("ascii", "replace").strip() or "unknown"
            os.close(fd)
            if exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN):
                raise StateError(f"state folder {self.path.parent} is in use by another "
                                 f"shoal process (pid {holder})") from exc
            raise StateError(f"cannot lock {self.path}: {exc.strerror}") from exc
        os.ftruncate(fd, 0)
        os.pwrite(fd, str(os.getpid()).encode(), 0)
        self._fd = fd
        return self

    def release(self) -> None:
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None

    def __enter__(self) -> "StateLock":
        return self.acquire()

    def __exit__(self, *exc) -> None:
        self.release()


def remove_stale_temps(layout: Layout) -> int:
    """Remove temp files left by a killed process (call with the state lock held)."""
    removed = 0
    for folder, pattern in ((layout.outbox, ".*.labels.*.tmp"),
                            (layout.quarantine, ".*.json.*.tmp")):
        for path in folder.glob(pattern):
            if path.is_file() and not path.is_symlink():
                path.unlink()
                removed += 1
    return removed


def _count(folder: Path, pattern: str) -> int:
    try:
        return sum(1 for p in folder.glob(pattern) if not p.name.startswith("."))
    except OSError:
        return 0


def folder_use(layout: Layout) -> str | None:
    """What shows that this state folder was used before (labels in the outbox, inputs in
    ``processed/`` or ``quarantine/``), or None: a store missing or emptied in a used
    folder is refused, not made afresh (see :class:`~shoal.daemon.state.store.StateStore`)."""
    found = [f"{n} {what}" for n, what in (
        (_count(layout.outbox, "*.labels.*"), f"labels files in {layout.outbox}"),
        (_count(layout.processed, "*"), f"inputs in {layout.processed}"),
        (_count(layout.quarantine, "*.json"), f"quarantine records in {layout.quarantine}"),
    ) if n]
    return "; ".join(found) or None


def open_store(layout: Layout, **kwargs) -> StateStore:
    """The state store of ``layout``, refused if it was lost from a used folder."""
    return StateStore(layout.db, used_evidence=lambda: folder_use(layout), **kwargs)
