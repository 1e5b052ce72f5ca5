"""Content digests of inputs: the identity behind the ledger, the labels files' names and
the ``input_digest`` key of their metadata.

A state store records the algorithm its ledger uses (``StateStore.digest_algorithm``):
BLAKE3 for a store made by this version (a small part of SHA-256's CPU time per input),
and SHA-256 for a store made before the record existed, which keeps it, so that an input
committed before an upgrade is still found done afterwards. Every content digest is
made by :func:`content_hasher` with the algorithm of the store it is compared with;
:class:`file_digest` computes one in a thread while the input is read.
"""
from __future__ import annotations

import hashlib
import os
import threading
from typing import BinaryIO

import blake3

from shoal.daemon.errors import StateError

__all__ = ["DIGEST_ALGORITHMS", "NEW_STORE_ALGORITHM", "UNRECORDED_ALGORITHM", "BLOCK",
           "check_algorithm", "content_hasher", "digest_file", "hash_blocks", "file_digest"]

DIGEST_ALGORITHMS = ("blake3", "sha256")
NEW_STORE_ALGORITHM = "blake3"
UNRECORDED_ALGORITHM = "sha256"   # a store made before the algorithm was recorded
BLOCK = 1 << 20                   # bytes per read (and per hasher update)


def check_algorithm(algorithm: str) -> str:
    """``algorithm`` if it is one shoal computes, else a :class:`StateError` naming it."""
    if algorithm not in DIGEST_ALGORITHMS:
        raise StateError(f"content digest algorithm {algorithm!r} is not one this shoal "
                         f"computes ({', '.join(DIGEST_ALGORITHMS)})")
    return algorithm


def content_hasher(algorithm: str):
    """A new incremental hasher (``update``, ``hexdigest``) for ``algorithm``.

    BLAKE3 runs single-threaded (``max_threads=1``): the daemon's other core is busy
    with the model. Its ``update`` releases the interpreter lock for large buffers, as
    hashlib's does, so hashing in a thread overlaps the model's work.
    """
    if check_algorithm(algorithm) == "blake3":
        return blake3.blake3(max_threads=1)
    return hashlib.sha256()


def digest_file(f: BinaryIO, algorithm: str) -> str:
    """Hex digest of the whole open file ``f`` (read with ``os.preadv`` from its start;
    the file's offset is left where it was)."""
    h = content_hasher(algorithm)
    hash_blocks(h, f.fileno())
    return h.hexdigest()


def hash_blocks(h, fd: int, stop=None) -> bool:
    """Feed the whole file ``fd`` to the hasher ``h``, BLOCK bytes at a time from its
    start (``os.preadv``: its offset is left as it was), into one buffer reused for every
    block: a new 1 MiB ``bytes`` a block is fresh memory the kernel must zero, which cost
    as much CPU as the hashing itself. ``stop()``, asked before each block, ends it
    early; returns whether the end of the file was reached."""
    buffer = bytearray(BLOCK)
    view = memoryview(buffer)
    offset = 0
    while stop is None or not stop():
        n = os.preadv(fd, [buffer], offset)
        if n == 0:
            return True
        h.update(view[:n])
        offset += n
    return False


class file_digest:
    """The content digest of an open file (:func:`shoal.daemon.files.digest.content_hasher` with
    ``algorithm``, the state store's), computed in a thread (``os.preadv``: the file's
    offset is left to its reader), so that hashing overlaps with reading and learning.
    Use it as a context manager; :meth:`result` waits for the hex digest.
    ``threaded=False`` hashes in :meth:`result` instead (small inputs)."""

    def __init__(self, f: BinaryIO, algorithm: str, threaded: bool = True):
        self._fd = f.fileno()
        self._hasher = content_hasher(algorithm)   # an unknown algorithm fails here
        self._stop = threading.Event()
        self._digest: str | None = None
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._run, name="shoal-digest", daemon=True) \
            if threaded else None

    def __enter__(self) -> "file_digest":
        if self._thread is not None:
            self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join()

    def ready(self) -> bool:
        """Whether :meth:`result` answers without waiting for the hashing thread."""
        return self._thread is None or not self._thread.is_alive()

    def result(self) -> str:
        if self._thread is not None:
            self._thread.join()
        elif self._digest is None and self._error is None:
            self._run()
        if self._error is not None:
            raise self._error
        if self._digest is None:
            raise RuntimeError("the digest was stopped before it finished")
        return self._digest

    def _run(self) -> None:
        try:
            if hash_blocks(self._hasher, self._fd, self._stop.is_set):
                self._digest = self._hasher.hexdigest()
        except OSError as exc:   # handed to result()
            self._error = exc
