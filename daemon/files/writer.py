"""Labels files: their names, their columns, and atomic writing.

Atomic write: a temp file in the same folder, fsync, ``os.replace``, fsync the
folder; on failure the temp file is removed and the error re-raised. Outputs
are created with mode 0640. A labels file's name is derived from the input's
name (reduced to safe characters) and its content hash, so it can never
escape the outbox and the same input always gets the same name.
"""
from __future__ import annotations

import base64
import contextlib
import hashlib
import os
import queue
import re
import threading
import unicodedata
from pathlib import Path
from typing import BinaryIO, Callable, Iterable, Iterator

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from shoal.daemon.files.readers import prefetch

__all__ = ["labels_name", "safe_stem", "display_name", "labels_table", "atomic_file", "write_labels",
           "write_labels_stream", "LabelsFile", "relabelled_table", "fsync_dir", "OUTPUT_MODE",
           "LABELS_COLUMNS"]

OUTPUT_MODE = 0o640
_UNSAFE = re.compile(r"[^A-Za-z0-9._-]+")
_INPUT_SUFFIX = re.compile(r"(\.csv\.gz|\.csv|\.tsv\.gz|\.tsv|\.parquet|\.pq)$",
                           re.IGNORECASE)


def safe_stem(name: str, limit: int = 80) -> str:
    """``name`` without folders or its input suffix, in ``[A-Za-z0-9._-]``, never hidden."""
    base = name.replace("\\", "/").rsplit("/", 1)[-1]
    base = _INPUT_SUFFIX.sub("", base)
    base = unicodedata.normalize("NFKD", base).encode("ascii", "ignore").decode("ascii")
    base = _UNSAFE.sub("_", base)
    base = re.sub(r"\.{2,}", "_", base).strip("._-")
    return base[:limit] or "input"


def display_name(name: str) -> str:
    """``name`` as text that is valid UTF-8 everywhere (ledger, logs, metadata, sidecars):
    the bytes of a file name that are not UTF-8 (which Python keeps as lone surrogates)
    become ``\\xNN`` escapes; any other name is returned as it is."""
    return os.fsencode(name).decode("utf-8", "backslashreplace")


# Input suffixes whose names keep their labels file name plain: a stem made only of safe
# characters names one input with such a suffix (``.pq`` may hold the same bytes as
# ``.parquet``, ``a.CSV`` those of ``a.csv``, so those names are told apart by a tag).
_PLAIN_SUFFIXES = (".csv", ".csv.gz", ".tsv", ".tsv.gz", ".parquet")


def labels_name(input_name: str, digest: str, fmt: str) -> str:
    """``<safe stem>.<first 16 hex digits of the content digest>.labels.<ext>``.

    Where the safe stem loses something of the name (``sensor 1.csv`` and ``sensor_1.csv``
    share the stem ``sensor_1``), the stem is followed by ``-`` and 8 hex digits of a
    hash of the whole name, so two inputs of one content under different names (the
    second a duplicate) never share a labels file.
    """
    ext = "parquet" if fmt == "parquet" else "csv"
    stem = safe_stem(input_name.replace("\\", "_"))   # an input name is never a path
    if not any(input_name == stem + suffix for suffix in _PLAIN_SUFFIXES):
        tag = hashlib.blake2b(os.fsencode(input_name), digest_size=4).hexdigest()
        stem = f"{stem[:71]}-{tag}"
    return f"{stem}.{digest[:16]}.labels.{ext}"


def labels_table(passthrough: pa.Table, valid: np.ndarray, segment: np.ndarray | None,
                 confidence: np.ndarray | None, log_density: np.ndarray | None,
                 unusual_below, model_version: int | None,
                 log_jacobian: np.ndarray | None = None,
                 observed: np.ndarray | None = None) -> pa.Table:
    """The labels of one input, one row per input row.

    ``unusual`` compares ``log_density`` (the model's own units) with ``unusual_below``;
    the ``log_density`` column adds ``log_jacobian`` (valid rows, the configured
    transforms'), so that it is a density in the data's units.

    ``segment``/``confidence``/``log_density`` hold values for the valid rows
    only (or are None when no model exists yet); invalid rows get nulls.
    ``unusual_below`` is one threshold, or one per valid row (rows with missing features
    have their own: :class:`shoal.daemon.files.gaps.Unusual`). ``observed`` (every row's
    number of features present) becomes the ``observed`` column, never null.
    The columns are made from numpy buffers directly (``pa.Array.from_buffers``):
    ``pa.array`` on a numpy array imports pandas on its first call (0.3-0.6 s of the
    first input of every process) and copies the values once more.
    """
    n = len(valid)
    scored = segment is not None
    n_valid = int(np.count_nonzero(valid)) if scored else 0
    if not scored:
        validity = pa.py_buffer(np.zeros((n + 7) // 8, dtype=np.uint8))  # all null
    elif n_valid == n:
        validity = None
    else:
        validity = pa.py_buffer(np.packbits(valid, bitorder="little"))
    nulls = n - n_valid

    def spread(values, dtype):
        if not scored:
            return np.zeros(n, dtype=dtype)
        if n_valid == n:
            return np.ascontiguousarray(values, dtype=dtype)
        full = np.zeros(n, dtype=dtype)
        full[valid] = values
        return full

    def column(arrow_type, data: np.ndarray) -> pa.Array:
        return pa.Array.from_buffers(arrow_type, n, [validity, pa.py_buffer(data)],
                                     null_count=nulls)

    ld = spread(log_density, np.float64)
    if not np.isscalar(unusual_below):
        unusual_below = spread(unusual_below, np.float64)
    unusual = np.packbits(ld < unusual_below, bitorder="little")
    if scored and log_jacobian is not None:
        ld = spread(log_density + log_jacobian, np.float64)
    cols = {
        "segment": column(pa.int64(), spread(segment, np.int64)),
        "confidence": column(pa.float64(), spread(confidence, np.float64)),
        "log_density": column(pa.float64(), ld),
        "unusual": column(pa.bool_(), unusual),
        "model_version": column(pa.int64(), np.full(n, model_version if scored else 0,
                                                    dtype=np.int64)),
    }
    if observed is not None:
        cols["observed"] = pa.Array.from_buffers(
            pa.int64(), n, [None, pa.py_buffer(np.ascontiguousarray(observed, np.int64))])
    table = passthrough
    for name, arr in cols.items():
        table = table.append_column(name, arr)
    return table


# shoal's own columns of a labels file, after the pass-through columns
LABELS_COLUMNS = ("segment", "confidence", "log_density", "unusual", "model_version",
                  "observed", "segment_name")


def relabelled_table(path: Path, fmt: str, valid: np.ndarray | None, scores,
                     unusual_below: float, model_version: int,
                     log_jacobian: np.ndarray | None = None,
                     passthrough: pa.Schema | None = None) -> tuple[pa.Table, dict]:
    """The labels file ``path`` (written without a model) with its labels columns
    replaced by ``scores`` of its ``valid`` rows, and its ``shoal.*`` metadata with the
    new model version (the caller writes them back, e.g. with :class:`LabelsFile`); the
    pass-through columns and the other metadata stay. ``valid`` None: every row (the
    count must agree). ``passthrough``, the stream's pass-through types, reads a CSV
    file's columns back as they were written. Raises ValueError when the rows do not
    match the scores."""
    if fmt == "parquet":
        table = pq.read_table(path)
    else:
        types = {} if passthrough is None else dict(zip(passthrough.names, passthrough.types))
        table = pacsv.read_csv(path, convert_options=pacsv.ConvertOptions(
            column_types=types, strings_can_be_null=True))
    n_scored = len(scores.segment)
    if valid is None:
        if table.num_rows != n_scored:
            raise ValueError(f"{table.num_rows} rows in the file, {n_scored} scored, and "
                             "which rows were valid was not kept")
        valid = np.ones(table.num_rows, dtype=bool)
    if len(valid) != table.num_rows or int(np.count_nonzero(valid)) != n_scored:
        raise ValueError(f"{table.num_rows} rows in the file, {len(valid)} known, "
                         f"{n_scored} scored")
    meta = {k.decode()[len("shoal."):]: v.decode()
            for k, v in (table.schema.metadata or {}).items() if k.startswith(b"shoal.")}
    meta["model_version"] = model_version
    observed = table.column("observed").to_numpy() if "observed" in table.column_names \
        else None   # every row's count of features present, as it was written
    passthrough = table.drop_columns([c for c in LABELS_COLUMNS if c in table.column_names])
    passthrough = passthrough.replace_schema_metadata(
        {k: v for k, v in (table.schema.metadata or {}).items()
         if not k.startswith(b"shoal.") and k != b"ARROW:schema"} or None)
    new = labels_table(passthrough, valid, scores.segment, scores.confidence,
                       scores.log_density, unusual_below, model_version, log_jacobian,
                       observed=observed)
    return new, meta


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
        meta.update(_shoal_keys(metadata))
        table = table.replace_schema_metadata(meta)
    with atomic_file(target, sync_folder=sync_folder) as f:
        if fmt == "parquet":
            pq.write_table(table, f, compression="zstd")
        else:
            pacsv.write_csv(table, f)
    return target


# Labels columns with few distinct values, dictionary-encoded; confidence and
# log_density (nearly all values distinct) are not.
_DICTIONARY_COLUMNS = ("segment", "unusual", "model_version")
# Labels tables made ahead of the one being written (a 65,536-row table is a few MB).
_TABLES_AHEAD = 4


def write_labels_stream(tables: Iterable[pa.Table], target: Path, fmt: str,
                        metadata: Callable[[], dict], sync_folder: bool = True,
                        final: Callable[[], Path] | None = None,
                        threaded: bool = True,
                        ready: Callable[[], bool] | None = None) -> Path:
    """Write the labels ``tables`` (all of one schema) one after another into ``target``
    (or ``final()``), atomically, holding only a few tables at a time (``sync_folder``,
    ``final``: see :func:`atomic_file`). Returns the file written.

    ``metadata()`` (the ``shoal.*`` keys of a Parquet file's schema metadata) is asked
    exactly once whatever the format, and only if a table arrives: as the first table
    is written when ``ready()`` says it can answer without waiting (no ``ready``:
    always), else after the first later table for which it can, else once the last
    table is written; an error raised by ``metadata()`` is raised here and the temp file
    removed. A Parquet file is the same, byte for byte, whenever the metadata was asked
    (:func:`_late_metadata`). Ingest writes with :class:`LabelsFile` instead, which is
    handed the tables and, at the end, the metadata.

    The tables are made in a worker thread (:class:`~shoal.daemon.files.readers.prefetch`)
    while this thread encodes and writes the ones made before (pyarrow releases the
    interpreter lock), so making labels and writing them overlap (``threaded=False``:
    one after the other, for small inputs). An error in making them is raised here and
    the temp file removed. A Parquet file gets a row group per table, zstd-compressed.
    Dictionary encoding is used for the labels columns with few values (segment,
    unusual, model_version) and for text pass-through columns; not for the float labels
    or numeric and time pass-through columns (ids, times: mostly distinct values),
    where in row groups of 65,536 rows it took more time and made the file larger.
    Integer and time pass-through columns are delta-encoded (:func:`_delta_column`).
    """
    names = [target]

    def named() -> Path:
        names.append(Path(final()))
        return names[-1]

    with atomic_file(target, sync_folder=sync_folder, final=named if final else None) as f, \
            prefetch(tables, depth=_TABLES_AHEAD, name="shoal-labels",
                     threaded=threaded) as ahead:
        writer = meta = None
        late = False
        try:
            for table in ahead:
                if writer is None:
                    if ready is None or ready():
                        meta = metadata()
                    writer = _open_writer(f, table.schema, fmt, meta)
                    late = meta is None
                elif meta is None and ready():
                    meta = metadata()
                writer.write_table(table)
            if writer is not None:
                if meta is None:
                    meta = metadata()
                if late and fmt == "parquet":
                    _late_metadata(writer, meta)
        finally:
            if writer is not None:
                writer.close()
    return names[-1]


def _shoal_keys(meta: dict) -> dict:
    """``shoal.*`` metadata keys; a value that is None (no model version during the
    warm-up) is left out rather than written as the text 'None'."""
    return {f"shoal.{k}".encode(): str(v).encode() for k, v in meta.items() if v is not None}


def _schema_metadata(schema: pa.Schema, meta: dict) -> dict:
    out = dict(schema.metadata or {})
    out.update(_shoal_keys(meta))
    return out


def _open_writer(f: BinaryIO, schema: pa.Schema, fmt: str, meta: dict | None):
    """A writer for ``schema``; ``meta`` None: the shoal keys come later (Parquet)."""
    if fmt != "parquet":
        return pacsv.CSVWriter(f, schema)
    if meta is not None:
        schema = schema.with_metadata(_schema_metadata(schema, meta))
    dictionary = [n for n in schema.names if _dictionary_column(n, schema.field(n).type)]
    delta = {n: "DELTA_BINARY_PACKED" for n in schema.names
             if n not in dictionary and _delta_column(schema.field(n).type)}
    return pq.ParquetWriter(f, schema, compression="zstd", use_dictionary=dictionary,
                            column_encoding=delta or None)


def _dictionary_column(name: str, arrow_type: pa.DataType) -> bool:
    return name in _DICTIONARY_COLUMNS or pa.types.is_string(arrow_type) or \
        pa.types.is_large_string(arrow_type) or pa.types.is_binary(arrow_type) or \
        pa.types.is_large_binary(arrow_type)


def _delta_column(arrow_type: pa.DataType) -> bool:
    """Integer and time pass-through columns (ids, counters, timestamps: mostly rising)
    are delta-encoded: in the end-to-end bench's labels (a rising int64 id) a third less
    CPU to encode than plain values under zstd, and a smaller file."""
    return pa.types.is_integer(arrow_type) or pa.types.is_timestamp(arrow_type) or \
        pa.types.is_date(arrow_type) or pa.types.is_time(arrow_type) or \
        pa.types.is_duration(arrow_type)


def _late_metadata(writer: pq.ParquetWriter, meta: dict) -> None:
    """Give an open Parquet writer the shoal keys of its schema metadata before it closes.

    Arrow stores the schema a writer was opened with in the footer's key-value metadata:
    its own metadata as keys, and the whole schema under ``ARROW:schema`` (the IPC
    serialisation, base64; what readers rebuild the schema and its metadata from). Both
    are replaced here as a writer opened with the metadata would have written them, so
    the file is the same (tests/test_service_gate_writer.py compares the bytes).
    """
    schema = writer.schema.with_metadata(_schema_metadata(writer.schema, meta))
    kv = dict(schema.metadata)
    kv[b"ARROW:schema"] = base64.b64encode(schema.serialize().to_pybytes())
    writer.add_key_value_metadata(kv)


class LabelsFile:
    """A labels file written table by table under a temporary name, then named at the end.

    The caller's thread hands over finished tables (:meth:`write_all`) and, once the
    input is decided, the ``shoal.*`` metadata and the final name (:meth:`keep`); a file
    not kept (the input turned out to be a duplicate, or an error ended it) is removed
    when the ``with`` block is left. The writer knows nothing of where the tables come
    from: it never calls back. With ``threaded``, a thread of its own encodes and
    writes the tables (pyarrow releases the interpreter lock) while the caller makes
    the next ones, at most a few tables behind; without, the caller's thread writes
    them. A Parquet file gets its metadata as the writer closes (:func:`_late_metadata`:
    the same bytes as a file opened with it), a row group per table, zstd-compressed,
    the encodings of :func:`write_labels_stream`.
    """

    def __init__(self, target: Path, fmt: str, sync_folder: bool = True,
                 threaded: bool = True):
        self.target = Path(target)
        self.fmt = fmt
        self.sync_folder = sync_folder
        self._tmp = self.target.with_name(f".{self.target.name}.{os.getpid()}.tmp")
        self._file: BinaryIO | None = None
        self._writer = None
        self._queue: queue.Queue | None = queue.Queue(maxsize=_TABLES_AHEAD) \
            if threaded else None
        self._thread: threading.Thread | None = None
        self._error: BaseException | None = None
        self._kept: Path | None = None
        self._abandoned = False   # left without keep(): tables still queued are dropped

    def __enter__(self) -> "LabelsFile":
        fd = os.open(self._tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC | os.O_NOFOLLOW
                     | os.O_CLOEXEC, OUTPUT_MODE)
        try:
            os.fchmod(fd, OUTPUT_MODE)
            self._file = os.fdopen(fd, "wb")
        except BaseException:
            os.close(fd)
            self._discard()
            raise
        if self._queue is not None:
            self._thread = threading.Thread(target=self._drain, name="shoal-labels",
                                            daemon=True)
            self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._abandoned = self._kept is None
        self._stop_thread()
        if self._kept is None:
            with contextlib.suppress(Exception):
                if self._writer is not None:
                    self._writer.close()
            with contextlib.suppress(OSError):
                self._file.close()
            self._discard()

    def write_all(self, tables: Iterable[pa.Table]) -> None:
        """Write ``tables`` (all of one schema) in order; an error of the writing
        thread is raised here, at the latest by :meth:`keep`."""
        for table in tables:
            if self._queue is None:
                self._write(table)
                continue
            while True:
                if self._error is not None:
                    raise self._error
                try:
                    self._queue.put(table, timeout=0.05)
                    break
                except queue.Full:
                    continue

    def keep(self, metadata: dict, final: Path | None = None) -> Path:
        """Finish the file with ``metadata`` (Parquet schema metadata) and rename it to
        ``final`` (in the same folder; default ``target``) atomically; returns it."""
        self._stop_thread()
        if self._error is not None:
            raise self._error
        if self._writer is not None:
            if self.fmt == "parquet":
                _late_metadata(self._writer, metadata)
            self._writer.close()
        self._file.flush()
        os.fsync(self._file.fileno())
        self._file.close()
        final = self.target if final is None else Path(final)
        os.replace(self._tmp, final)
        self._kept = final
        if self.sync_folder:
            fsync_dir(final.parent)
        return final

    def _write(self, table: pa.Table) -> None:
        if self._writer is None:
            self._writer = _open_writer(self._file, table.schema, self.fmt, None)
        self._writer.write_table(table)

    def _drain(self) -> None:
        while True:
            table = self._queue.get()
            if table is None:
                return
            if self._error is not None or self._abandoned:
                continue   # taken to unblock the caller (who sees the error), not written
            try:
                self._write(table)
            except BaseException as exc:   # raised in the caller's thread
                self._error = exc

    def _stop_thread(self) -> None:
        if self._thread is None:
            return
        while True:
            try:
                self._queue.put(None, timeout=0.05)
                break
            except queue.Full:
                if not self._thread.is_alive():
                    break
        self._thread.join()
        self._thread = None

    def _discard(self) -> None:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(self._tmp)
