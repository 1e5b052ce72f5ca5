"""How the store keeps arrays and JSON: ``.npy`` bytes without pickle, and checksums.

Checkpoint arrays, warm-up rows and kept duplicate rows are stored as the bytes
``np.save`` writes and read back with ``allow_pickle=False``, so a store never runs
code when it is opened. Each checkpoint part carries a BLAKE2b checksum that is
checked when it is loaded: a damaged store is refused, never read as a wrong model.
The schema, its migrations and the table modules all use these helpers; they hold no
state of their own beyond a small cache of ``.npy`` headers.
"""
from __future__ import annotations

import hashlib
import io

import numpy as np

__all__ = ["checksum", "json_checksum", "npy_bytes", "npy_array"]


def checksum(data: bytes) -> str:
    """BLAKE2b-128 of ``data`` in hex: a stored checkpoint part is checked against it."""
    return hashlib.blake2b(data, digest_size=16).hexdigest()


def json_checksum(meta: str, extra: str) -> str:
    """The checksum of a checkpoint's meta and extra JSON texts, taken together."""
    return checksum(meta.encode() + b"\0" + extra.encode())


# .npy headers by (dtype, shape): a checkpoint stores the same dozen arrays every time.
_NPY_HEADERS: dict[tuple[str, tuple], bytes] = {}


def npy_bytes(array: np.ndarray) -> bytes:
    """``array`` as the bytes ``np.save`` writes (format 1.0), without pickle.

    A C-ordered numeric array is written as its cached header plus its raw bytes
    (byte-identical to ``np.save``, and much quicker for the small arrays of a
    checkpoint); anything else goes through ``np.save``.
    """
    a = np.asarray(array)
    if a.dtype.hasobject or a.dtype.names is not None or not a.flags.c_contiguous:
        buf = io.BytesIO()
        np.save(buf, a, allow_pickle=False)
        return buf.getvalue()
    key = (a.dtype.str, a.shape)
    header = _NPY_HEADERS.get(key)
    if header is None:
        buf = io.BytesIO()
        np.lib.format.write_array_header_1_0(buf, np.lib.format.header_data_from_array_1_0(a))
        header = buf.getvalue()
        if len(_NPY_HEADERS) >= 256:
            _NPY_HEADERS.clear()
        _NPY_HEADERS[key] = header
    return header + a.tobytes()


def npy_array(blob: bytes) -> np.ndarray:
    """The array of ``.npy`` bytes, refusing pickled object arrays."""
    return np.load(io.BytesIO(blob), allow_pickle=False)
