"""The state folder's marker: proof, outside the database, that a store was made here and
how far its commits had got.

``state.db`` alone cannot tell an emptied or rolled-back store from a new one: truncated
to 0 bytes it opens as a fresh store, and with ``state.db-wal`` deleted after a crash it
opens as the store it was at its last checkpoint into the main file. The marker
(``state.marker`` beside ``state.db``) is written when the store is made, with the
store's id (also kept in the store's ``meta``), and after each commit with the ledger's
last row id and the model version. The store must be at least as far as the marker says:
the marker is written after the commit is durable, so a crash can only leave it behind
the store, never ahead.

The marker is a small fixed-width text file. Its counters are rewritten in place with
one ``pwrite`` (no fsync: a marker left behind by a power cut only weakens the check,
it can never refuse a good store). A marker whose counters cannot be parsed still says
that the folder was used.
"""
from __future__ import annotations

import contextlib
import os
import re
import secrets
import zlib
from dataclasses import dataclass
from pathlib import Path

__all__ = ["Marker", "marker_path", "read_marker", "create_marker", "new_store_id",
           "MarkerWriter"]

_HEAD = "shoal state marker: made with the state store; do not delete\n"
_ID = re.compile(r"^store_id ([0-9a-f]{32})$", re.M)
_COUNTERS = re.compile(r"^ledger_rows (\d{20})\nmodel_version (\d{20})\ncheck ([0-9a-f]{8})$",
                       re.M)
_MAX_BYTES = 4096


@dataclass(frozen=True)
class Marker:
    """A marker as read: the store id it vouches for and the counters it last recorded
    (None where damaged or unreadable, which weakens the check but still says the folder
    was used)."""
    path: Path
    store_id: str | None          # None: the marker is damaged
    ledger_rows: int | None       # None: counters unreadable (the check is skipped)
    model_version: int | None


def marker_path(db: Path) -> Path:
    """``state/state.marker`` for ``state/state.db``."""
    return Path(db).with_suffix(".marker")


def new_store_id() -> str:
    return secrets.token_hex(16)


def _counters(ledger_rows: int, model_version: int) -> bytes:
    """The counters' fixed-width lines, with a CRC-32 of them: a read that overlaps a
    rewrite (another process's, in place) is told from a real value."""
    body = f"ledger_rows {ledger_rows:020d}\nmodel_version {model_version:020d}\n"
    return (body + f"check {zlib.crc32(body.encode()):08x}\n").encode()


def _parse_counters(text: str) -> tuple[int, int] | None:
    found = _COUNTERS.search(text)
    if found is None:
        return None
    rows, version = int(found.group(1)), int(found.group(2))
    return (rows, version) if _counters(rows, version).decode() == found.group(0) + "\n" \
        else None


def read_marker(db: Path) -> Marker | None:
    """The marker of the store at ``db``; None when there is none."""
    path = marker_path(db)
    for _ in range(5):   # a read torn by a concurrent rewrite fails its check: read again
        try:
            with open(path, "rb") as f:
                text = f.read(_MAX_BYTES).decode("ascii", "replace")
        except FileNotFoundError:
            return None
        except IsADirectoryError:
            return Marker(path, None, None, None)
        counters = _parse_counters(text)
        if counters is not None:
            break
    found = _ID.search(text)
    return Marker(path, found.group(1) if found else None,
                  *(counters if counters is not None else (None, None)))


def create_marker(db: Path, store_id: str, ledger_rows: int, model_version: int) -> Marker:
    """Write the marker once (fsynced, never over an existing one); return what is there."""
    path = marker_path(db)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    body = (_HEAD + f"store_id {store_id}\n").encode() + _counters(ledger_rows, model_version)
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC | os.O_CLOEXEC, 0o600)
    try:
        os.write(fd, body)
        os.fsync(fd)
    finally:
        os.close(fd)
    try:
        os.link(tmp, path)   # fails if another opener made it first: theirs stands
    except FileExistsError:
        pass
    finally:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
    dfd = os.open(path.parent, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(dfd)
    finally:
        os.close(dfd)
    return read_marker(db)


class MarkerWriter:
    """Moves the marker's counters forward after each commit (one ``pwrite``, no fsync)."""

    def __init__(self, db: Path):
        path = marker_path(db)
        self.fd = os.open(path, os.O_RDWR | os.O_CLOEXEC)
        text = os.pread(self.fd, _MAX_BYTES, 0).decode("ascii", "replace")
        at = text.find("\nledger_rows ")   # rewritten whole, so a torn record is repaired
        self.offset = None if at < 0 else len(text[:at + 1].encode())
        self.last: tuple[int, int] | None = None

    def note(self, ledger_rows: int, model_version: int) -> None:
        if self.offset is None or self.last == (ledger_rows, model_version):
            return
        os.pwrite(self.fd, _counters(ledger_rows, model_version), self.offset)
        self.last = (ledger_rows, model_version)

    def close(self) -> None:
        if self.fd is not None:
            os.close(self.fd)
            self.fd = None
