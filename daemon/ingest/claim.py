"""Claim an input: open it, pin it, and decide by its content digest what it is.

An input is opened without following links or blocking on FIFOs and pinned (device,
inode, size, modification time) as reading starts; it is committed only if it is
still that file (:func:`check_unchanged`). :class:`Claim` asks the ledger (and the
open group) about the input's content digest: new, a duplicate (the same content
under another name: labelled, not learned) or already done (the same name and
content). The hash is made beside the reading for large inputs, so the claim is
decided as soon as the digest is known: before the first frame when it is at hand,
between frames otherwise, at the latest when the last frame was read; the labels
are written under a temporary name until then.
"""
from __future__ import annotations

import errno
import os
import stat as stat_mod
from pathlib import Path
from typing import BinaryIO

from shoal.config import Settings
from shoal.daemon.errors import InputChanged, InputRefused, InputVanished
from shoal.daemon.files.readers import file_digest
from shoal.daemon.files.writer import display_name
from shoal.daemon.state.store import LedgerEntry, StateStore

__all__ = ["open_input", "input_name", "attempt_key", "check_unchanged", "Claim", "NEW", "DUPLICATE",
           "ALREADY_DONE"]

NEW, DUPLICATE, ALREADY_DONE = "new", "duplicate", "already_done"

# Errors of opening an input that may pass: out of descriptors or memory, permissions
# not yet set by the producer, an I/O error.
_TRANSIENT_OPEN = frozenset({errno.EMFILE, errno.ENFILE, errno.ENOMEM, errno.EACCES,
                             errno.EPERM, errno.EIO, errno.EAGAIN, errno.EINTR})


def open_input(path: Path) -> BinaryIO:
    """Open a regular file for reading without following links or blocking on FIFOs."""
    flags = os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | os.O_CLOEXEC
    try:
        fd = os.open(path, flags)
    except FileNotFoundError as exc:
        raise InputVanished(f"{path.name} no longer exists") from exc
    except OSError as exc:  # ELOOP: a symlink; ENXIO: a socket
        if exc.errno in _TRANSIENT_OPEN:
            raise   # retried in order (the service's fault path), not refused for good
        raise InputRefused(f"{path.name} cannot be opened as a regular file: "
                           f"{exc.strerror}") from exc
    st = os.fstat(fd)
    if not stat_mod.S_ISREG(st.st_mode):
        os.close(fd)
        raise InputRefused(f"{path.name} is not a regular file")
    os.set_blocking(fd, True)
    return os.fdopen(fd, "rb")


def input_name(settings: Settings, inbox: Path, path: Path) -> str:
    """An input's name in the ledger, logs and labels: its file name, or with
    ``watch.recursive`` its path relative to the inbox (``2025/05/a.csv``)."""
    if settings.watch.recursive:
        try:
            rel = path.relative_to(inbox)
        except ValueError:
            rel = None
        if rel is not None and len(rel.parts) > 1:
            return display_name(rel.as_posix())
    return display_name(path.name)


def attempt_key(path: Path) -> str | None:
    """What an attempt is recorded under: the file (device, inode) as it stands (size,
    modification time) and its name; None if it cannot be looked at."""
    try:
        st = os.lstat(path)
    except OSError:
        return None
    return f"{st.st_dev}:{st.st_ino}:{st.st_size}:{st.st_mtime_ns}:{display_name(path.name)}"


def check_unchanged(f: BinaryIO, pin: os.stat_result, name: str) -> None:
    """Raise InputChanged if the file grew or was rewritten since it was opened (a
    writer that paused past the settle time): not committed."""
    now = os.fstat(f.fileno())
    if (now.st_size, now.st_mtime_ns) != (pin.st_size, pin.st_mtime_ns):
        raise InputChanged(f"{name} changed while it was read ({pin.st_size}"
                           f" -> {now.st_size} bytes); taken again once settled")


class Claim:
    """The verdict on one input's content: :data:`NEW`, :data:`DUPLICATE` or
    :data:`ALREADY_DONE`, from its digest (``hashing``) against the ledger's inputs
    done and ``pending`` (the ledger rows of the open group, not yet committed).
    :meth:`poll` decides without waiting if the digest is known; :meth:`decide`
    waits for it."""

    def __init__(self, name: str, hashing: file_digest, store: StateStore,
                 pending: list[LedgerEntry]):
        self.name = name
        self._hashing = hashing
        self._store = store
        self._pending = pending
        self.digest: str | None = None
        self.done: list[LedgerEntry] = []
        self.verdict: str | None = None

    def poll(self) -> str | None:
        """The verdict if the digest is known by now (decided once), else None."""
        if self.verdict is None and self._hashing.ready():
            self.decide()
        return self.verdict

    def decide(self) -> str:
        """The verdict, waiting for the digest if need be."""
        if self.verdict is None:
            digest = self._hashing.result()
            done = self._store.find_done(digest) + [e for e in self._pending
                                                    if e.digest == digest]
            self.digest, self.done = digest, done
            if any(e.name == self.name for e in done):
                self.verdict = ALREADY_DONE
            else:
                self.verdict = DUPLICATE if done else NEW
        return self.verdict

    @property
    def seen(self) -> bool:
        """Decided, and the content is not new."""
        return self.verdict is not None and self.verdict != NEW
