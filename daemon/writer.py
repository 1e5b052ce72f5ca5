"""Labels files: their names, their columns, and atomic writing.

Atomic write: a temp file in the same folder, fsync, ``os.replace``, fsync the
folder; on failure the temp file is removed and the error re-raised. Outputs
are created with mode 0640. A labels file's name is derived from the input's
name (reduced to safe characters) and its content hash, so it can never
escape the outbox and the same input always gets the same name.
"""
from __future__ import annotations

import contextlib
import os
import re
import unicodedata
from pathlib import Path
from typing import BinaryIO, Callable, Iterable, Iterator

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from shoal.daemon.readers import prefetch

__all__ = ["labels_name", "safe_stem", "labels_table", "atomic_file", "write_labels",
           "write_labels_stream", "fsync_dir", "OUTPUT_MODE"]

OUTPUT_MODE = 0o640
_UNSAFE = re.compile(r"[^A-Za-z0-9._-]+")
_INPUT_SUFFIX = re.compile(r"(\.csv\.gz|\.csv|\.parquet|\.pq)$", re.IGNORECASE)


def safe_stem(name: str, limit: int = 80) -> str:
    """``name`` without folders or its input suffix, in ``[A-Za-z0-9._-]``, never hidden."""
    base = name.replace("\\", "/").rsplit("/", 1)[-1]
    base = _INPUT_SUFFIX.sub("", base)
    base = unicodedata.normalize("NFKD", base).encode("ascii", "ignore").decode("ascii")
    base = _UNSAFE.sub("_", base)
    base = re.sub(r"\.{2,}", "_", base).strip("._-")
    return base[:limit] or "input"


def labels_name(input_name: str, sha256: str, fmt: str) -> str:
    ext = "parquet" if fmt == "parquet" else "csv"
    return f"{safe_stem(input_name)}.{sha256[:16]}.labels.{ext}"


def labels_table(passthrough: pa.Table, valid: np.ndarray, segment: np.ndarray | None,
                 confidence: np.ndarray | None, log_density: np.ndarray | None,
                 unusual_below: float, model_version: int | None) -> pa.Table:
    """The labels of one input, one row per input row.

    ``segment``/``confidence``/``log_density`` hold values for the valid rows
    only (or are None when no model exists yet); invalid rows get nulls.
    """
    n = len(valid)
    mask = ~valid

    def spread(values, dtype):
        full = np.zeros(n, dtype=dtype)
        if values is not None:
            full[valid] = values
        return full

    scored = segment is not None
    null = mask if scored else np.ones(n, dtype=bool)
    ld = spread(log_density, np.float64)
    cols = {
        "segment": pa.array(spread(segment, np.int64), pa.int64(), mask=null),
        "confidence": pa.array(spread(confidence, np.float64), pa.float64(), mask=null),
        "log_density": pa.array(ld, pa.float64(), mask=null),
        "unusual": pa.array(ld < unusual_below, pa.bool_(), mask=null),
        "model_version": pa.array(np.full(n, model_version if scored else 0, dtype=np.int64),
                                  pa.int64(), mask=null),
    }
    table = passthrough
    for name, arr in cols.items():
        table = table.append_column(name, arr)
    return table


def fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


@contextlib.contextmanager
def atomic_file(target: Path, mode: int = OUTPUT_MODE, sync_folder: bool = True,
                final: Callable[[], Path] | None = None) -> Iterator[BinaryIO]:
    """Write ``target`` all at once: yields a binary file object for the temp file.

    ``sync_folder=False`` leaves the folder's fsync (which makes the rename durable)
    to the caller, who may cover several renames with one. ``final()``, if given, names
    the file to rename to (in the same folder) once the content is written; the temp
    file is named after ``target``.
    """
    target = Path(target)
    tmp = target.with_name(f".{target.name}.{os.getpid()}.tmp")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC | os.O_NOFOLLOW | os.O_CLOEXEC,
                 mode)
    try:
        os.fchmod(fd, mode)
        with os.fdopen(fd, "wb") as f:
            yield f
            f.flush()
            os.fsync(f.fileno())
        if final is not None:
            target = Path(final())
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
    if sync_folder:
        fsync_dir(target.parent)


def write_labels(table: pa.Table, target: Path, fmt: str, metadata: dict[str, str],
                 sync_folder: bool = True) -> Path:
    """Write ``table`` to ``target`` atomically, ``metadata`` in the Parquet schema
    (``sync_folder``: see :func:`atomic_file`)."""
    if fmt == "parquet":
        meta = dict(table.schema.metadata or {})
        meta.update({f"shoal.{k}".encode(): str(v).encode() for k, v in metadata.items()})
        table = table.replace_schema_metadata(meta)
    with atomic_file(target, sync_folder=sync_folder) as f:
        if fmt == "parquet":
            pq.write_table(table, f, compression="zstd")
        else:
            pacsv.write_csv(table, f)
    return target


_PLAIN_COLUMNS = ("confidence", "log_density")
# Labels tables made ahead of the one being written (a 65,536-row table is a few MB).
_TABLES_AHEAD = 4


def write_labels_stream(tables: Iterable[pa.Table], target: Path, fmt: str,
                        metadata: Callable[[], dict], sync_folder: bool = True,
                        final: Callable[[], Path] | None = None,
                        threaded: bool = True) -> Path:
    """Write the labels ``tables`` (all of one schema) one after another into ``target``
    (or ``final()``), atomically, holding only a few tables at a time; ``metadata()`` is
    asked for the Parquet schema's metadata when the first table arrives
    (``sync_folder``, ``final``: see :func:`atomic_file`). Returns the file written.

    The tables are made in a worker thread (:class:`~shoal.daemon.readers.prefetch`)
    while this thread encodes and writes the ones made before (pyarrow releases the
    interpreter lock), so making labels and writing them overlap (``threaded=False``:
    one after the other, for small inputs). An error in making
    them is raised here and the temp file removed. A Parquet file gets a row group per
    table; its float columns (confidence, log-density: nearly all values distinct) are
    not dictionary-encoded, which in row groups of 65,536 rows took twice the time and
    made the file larger.
    """
    names = [target]

    def named() -> Path:
        names.append(Path(final()))
        return names[-1]

    with atomic_file(target, sync_folder=sync_folder, final=named if final else None) as f, \
            prefetch(tables, depth=_TABLES_AHEAD, name="shoal-labels",
                     threaded=threaded) as ahead:
        writer = None
        try:
            for table in ahead:
                if writer is None:
                    writer = _open_writer(f, table.schema, fmt, metadata)
                writer.write_table(table)
        finally:
            if writer is not None:
                writer.close()
    return names[-1]


def _open_writer(f: BinaryIO, schema: pa.Schema, fmt: str, metadata: Callable[[], dict]):
    if fmt != "parquet":
        return pacsv.CSVWriter(f, schema)
    meta = dict(schema.metadata or {})
    meta.update({f"shoal.{k}".encode(): str(v).encode() for k, v in metadata().items()})
    return pq.ParquetWriter(f, schema.with_metadata(meta), compression="zstd",
                            use_dictionary=[n for n in schema.names if n not in _PLAIN_COLUMNS])
