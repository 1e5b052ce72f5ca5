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

import os
from pathlib import Path
from typing import BinaryIO

from shoal.config import Settings
from shoal.daemon.errors import InputChanged
from shoal.daemon.files.opening import open_input
from shoal.daemon.files.readers import file_digest
from shoal.daemon.files.writer import display_name
from shoal.daemon.state.store import LedgerEntry, StateStore

__all__ = ["open_input", "input_name", "attempt_key", "check_unchanged", "Claim", "NEW", "DUPLICATE",
           "ALREADY_DONE"]

NEW, DUPLICATE, ALREADY_DONE = "new", "duplicate", "already_done"

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
