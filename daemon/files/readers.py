"""Read an input into a feature matrix and a pass-through table, and validate it.

Only the configured columns are read, as pyarrow record batches. CSV is read
with explicit column types (features as float64, pass-through columns as
strings), ``.csv.gz`` through gzip. Anything that makes the file unusable
raises :class:`InputRejected` with a reason code and a detail that names the
column or line; rows whose features are null, NaN or infinite are only
marked (``Frame.valid``).
"""
from __future__ import annotations

import contextlib
import csv
import gzip
import io
import json
import os
import queue
import re
import threading
import zlib
from dataclasses import dataclass
from typing import BinaryIO, Callable, Iterator

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from shoal.config import Settings
from shoal.core import fused
from shoal.daemon.files.digest import content_hasher, hash_blocks
from shoal.daemon.errors import InputRejected, Interrupted

__all__ = ["Frame", "read_input", "iter_frames", "prefetch", "file_digest", "BATCH_ROWS",
           "FEATURE_BOUND"]

BATCH_ROWS = 65536
FEATURE_BOUND = 1e50
_CSV_BLOCK = 1 << 20
# Read buffer per Parquet column chunk. A page larger than the buffer is read straight
# into its own buffer, a smaller one through the buffer (a copy): with 64 KiB, pyarrow's
# usual 1 MiB pages skip that copy and 17 columns' buffers stay in L2. Reading a
# 1M-row, 17-column file: 0.255 CPU-s (median of 8) against 0.275 with 1 MiB buffers.
_PARQUET_BUFFER = 64 << 10
_HEADER_LIMIT = 1 << 20
# A .csv.gz may inflate this much whatever its ratio (small files compress well).
_INFLATE_FREE = 16 << 20
# Parquet footers: Thrift strings and lists past these are refused by the parser.
_THRIFT_STRING_LIMIT = 16 << 20
_THRIFT_CONTAINER_LIMIT = 1 << 20
# Parquet footers past this many bytes, or with more column chunks (row groups x
# columns) than this, are refused unparsed (memory to parse one: ~10 times its size).
_FOOTER_LIMIT = 8 << 20
_COLUMN_CHUNK_LIMIT = 100_000
# Record batches held for one frame are joined once this many are held (a file of tiny
# row groups would otherwise hold 65,536 one-row batches, ~2 KB of objects each).
_HELD_BATCHES = 256


@dataclass
class Frame:
    features: np.ndarray      # (n_rows, n_features) float64; NaN where null
    passthrough: pa.Table     # (n_rows,) the pass-through columns
    valid: np.ndarray         # (n_rows,) bool: all features finite and within FEATURE_BOUND
    # (and within model_range when the frame was read with one)
    model_range: tuple[np.ndarray, np.ndarray] | None = None   # (center, limit) checked
    beyond_range: int = 0     # rows refused by model_range alone (finite, within the bound)
    # set by shoal.daemon.model.transforming when features are transformed:
    log_jacobian: np.ndarray | None = None   # (n_rows,) of the transforms, 0 where invalid
    outside_domain: int = 0   # rows refused for a value outside a transform's domain
    observed: np.ndarray | None = None   # (n_rows,) features present per row, once counted

    @property
    def n_rows(self) -> int:
        return int(self.features.shape[0])

    @property
    def n_invalid(self) -> int:
        return int(self.n_rows - np.count_nonzero(self.valid))


def read_input(f: BinaryIO, kind: str, settings: Settings,
               should_stop: Callable[[], bool] = lambda: False,
               skipped: list[int] | None = None) -> Frame:
    """Read an open input file of ``kind`` (``parquet``/``csv``/``csv.gz``/``tsv``...)
    whole (``skipped``: see :func:`iter_frames`)."""
    frames = list(iter_frames(f, kind, settings, should_stop, skipped=skipped))
    if len(frames) == 1:
        return frames[0]
    return Frame(features=np.concatenate([fr.features for fr in frames]),
                 passthrough=pa.concat_tables([fr.passthrough for fr in frames]),
                 valid=np.concatenate([fr.valid for fr in frames]))


def iter_frames(f: BinaryIO, kind: str, settings: Settings,
                should_stop: Callable[[], bool] = lambda: False,
                rows: int = BATCH_ROWS,
                model_range: tuple[np.ndarray, np.ndarray] | None = None,
                skipped: list[int] | None = None) -> Iterator[Frame]:
    """Read an open input file of ``kind`` as frames of ``rows`` rows (the last one may be
    shorter), whatever record batches the file holds, so that memory stays bounded and
    the cut does not depend on how the file was written.

    ``model_range`` ``(center, limit)``, arrays of shape (n_features,): rows with a
    feature ``x`` where ``|x - center| > limit`` are invalid too (checked as the values
    are copied, in the same pass as the finite check).

    Limits are checked as the batches arrive: a file past one raises
    :class:`InputRejected` part-way, after frames before it were yielded. Any other
    failure of reading (a parser's error nobody foresaw) is :class:`InputRejected` too,
    reason ``unreadable``; an ``OSError`` of the file itself is raised as it is.

    ``skipped``: a list that gets the line numbers of CSV rows left out under
    ``input.bad_rows: skip`` (without it, such a row refuses the input).
    """
    try:
        yield from _iter_frames(f, kind, settings, should_stop, rows, model_range, skipped)
    except (InputRejected, Interrupted, OSError):
        raise
    except Exception as exc:
        raise InputRejected("unreadable", f"{type(exc).__name__}: {exc}",
                            exception=type(exc).__name__) from exc


def _iter_frames(f: BinaryIO, kind: str, settings: Settings, should_stop: Callable[[], bool],
                 rows: int, model_range: tuple[np.ndarray, np.ndarray] | None,
                 skipped: list[int] | None = None) -> Iterator[Frame]:
    if kind == "parquet":
        batches, schema = _parquet_batches(f, settings)
    elif kind in ("csv", "tsv"):
        size = f.seek(0, io.SEEK_END)
        f.seek(0)
        if size > settings.limits.max_data_bytes:
            raise _too_much_data(size, settings)
        batches, schema = _csv_batches(f, settings, kind == "tsv", skipped)
    elif kind in ("csv.gz", "tsv.gz"):
        batches, schema = _csv_batches(io.BufferedReader(_InflateGuard(f, settings), 1 << 16),
                                       settings, kind == "tsv.gz", skipped)
    else:
        raise InputRejected("unsupported_type", f"unsupported input type {kind!r}")
    pass_schema = pa.schema([_plain(schema.field(c)) for c in settings.passthrough])
    held: list[pa.RecordBatch] = []
    n_held = n = decoded = 0
    limit = settings.limits.max_rows
    for batch in _guard(batches, kind):
        if should_stop():
            raise Interrupted("stop requested while reading")
        n += batch.num_rows
        if n > limit:
            raise InputRejected("too_many_rows", f"more than limits.max_rows={limit} rows",
                                limit=limit)
        decoded += _decoded_bytes(batch)
        if decoded > settings.limits.max_data_bytes:
            raise _too_much_data(decoded, settings, " once decoded")
        held.append(_decode_dictionaries(batch))
        n_held += batch.num_rows
        if len(held) >= _HELD_BATCHES and n_held < rows:
            held = pa.Table.from_batches(held).combine_chunks().to_batches()
        while n_held >= rows:
            take, held = _split(held, rows)
            n_held -= rows
            yield _frame(take, settings, pass_schema, model_range)
    if n == 0:
        raise InputRejected("no_rows", "the input has no data rows")
    if n_held:
        yield _frame(held, settings, pass_schema, model_range)


class prefetch:
    """Iterate ``items`` in a reader thread, at most ``depth`` items ahead of the consumer.

    Reading and decoding (pyarrow, which releases the interpreter lock) then overlap
    with the work done on each item. An error in the reader thread is raised from the
    consumer's next step, after the items before it. Use it as a context manager:
    leaving the block (also early, or on an error) stops the reader and joins it.
    ``threaded=False`` iterates ``items`` in the consumer's thread instead (small inputs:
    starting a thread costs more than it saves).
    """

    def __init__(self, items, depth: int = 2, name: str = "shoal-reader",
                 threaded: bool = True):
        self._items = items
        self._queue: queue.Queue = queue.Queue(maxsize=depth)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name=name, daemon=True) \
            if threaded else None

    @property
    def threaded(self) -> bool:
        return self._thread is not None

    def __enter__(self) -> "prefetch":
        if self._thread is not None:
            self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        if self._thread is None:
            close = getattr(self._items, "close", None)
            if close is not None:
                close()
            return
        self._stop.set()
        while self._thread.is_alive():
            with contextlib.suppress(queue.Empty):   # unblock a waiting put
                self._queue.get(timeout=0.05)
        self._thread.join()

    def __iter__(self):
        if self._thread is None:
            yield from self._items
            return
        while True:
            kind, item = self._queue.get()
            if kind == "end":
                return
            if kind == "error":
                raise item
            yield item

    def _put(self, kind: str, item) -> bool:
        while not self._stop.is_set():
            try:
                self._queue.put((kind, item), timeout=0.05)
                return True
            except queue.Full:
                continue
        return False

    def _run(self) -> None:
        it = iter(self._items)
        try:
            for item in it:
                if not self._put("item", item):
                    return
            self._put("end", None)
        except BaseException as exc:  # handed to the consumer, raised there
            self._put("error", exc)
        finally:
            close = getattr(it, "close", None)
            if close is not None:
                close()


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


def _split(batches: list[pa.RecordBatch], rows: int):
    """The first ``rows`` rows of ``batches`` and the rest, as two lists of batches."""
    head: list[pa.RecordBatch] = []
    for i, batch in enumerate(batches):
        if batch.num_rows >= rows:
            head.append(batch.slice(0, rows))
            rest = [batch.slice(rows)] if batch.num_rows > rows else []
            return head, rest + batches[i + 1:]
        head.append(batch)
        rows -= batch.num_rows
    return head, []


_FILL_ROWS = 4096   # rows of the feature matrix filled at a time (they stay in cache)


def _frame(batches: list[pa.RecordBatch], settings: Settings, pass_schema: pa.Schema,
           model_range: tuple[np.ndarray, np.ndarray] | None = None) -> Frame:
    """One frame from record batches. Feature values past +-1e50 are refused like NaN
    (squares of their log-densities, in the drift statistics, would overflow), and with
    ``model_range`` values further than ``limit`` from ``center``. The columns are viewed
    on their Arrow buffers (not copied, where float64) and copied into the row-major
    feature matrix, in one compiled pass where the core's kernels are built."""
    n = sum(b.num_rows for b in batches)
    names = settings.features
    columns = []
    for name in names:
        parts = [_feature_values(batch.column(name)) for batch in batches]
        columns.append(parts[0] if len(parts) == 1 else np.concatenate(parts))
    features = np.empty((n, len(names)))
    valid = np.empty(n, dtype=bool)
    if fused.enabled():
        # one compiled pass: checks column by column, copy row by row (~65 ns a row at
        # D=16 against ~280 for the numpy passes below)
        center = limit = None
        if model_range is not None:
            center, limit = (np.ascontiguousarray(a, dtype=np.float64) for a in model_range)
        fused.kernels().rows_from_columns(columns, features, FEATURE_BOUND, center, limit,
                                          valid)
    else:
        _fill_checked(columns, features, valid, model_range)
    beyond = 0
    if model_range is not None and not valid.all():
        refused = features[~valid]
        with np.errstate(invalid="ignore"):
            beyond = int(np.count_nonzero(np.all(np.abs(refused) <= FEATURE_BOUND, axis=1)))
    passes = [b.select(list(settings.passthrough)) for b in batches]
    return Frame(features=features,
                 passthrough=pa.Table.from_batches(passes, schema=pass_schema), valid=valid,
                 model_range=model_range, beyond_range=beyond)


def _fill_checked(columns: list[np.ndarray], features: np.ndarray, valid: np.ndarray,
                  model_range: tuple[np.ndarray, np.ndarray] | None) -> None:
    """``features`` from ``columns`` and ``valid`` from their bounds, in numpy. Where the
    range lies well inside +-1e50 it implies the bound, which is then not checked again;
    the matrix is filled in blocks of rows that stay in cache (a transposing copy of a
    whole (features, rows) matrix took twice as long)."""
    n = len(valid)
    valid[:] = True
    scratch = np.empty(n)
    implied = np.zeros(len(columns), dtype=bool)
    if model_range is not None:
        center, limit = model_range
        implied = np.abs(center) + limit <= FEATURE_BOUND / 2
    for j, values in enumerate(columns):
        if not implied[j]:
            np.abs(values, out=scratch)
            valid &= scratch <= FEATURE_BOUND   # False for NaN
        if model_range is not None:
            np.subtract(values, center[j], out=scratch)
            np.abs(scratch, out=scratch)
            valid &= scratch <= limit[j]
    for lo in range(0, n, _FILL_ROWS):
        block = features[lo:lo + _FILL_ROWS]
        for j, values in enumerate(columns):
            block[:, j] = values[lo:lo + _FILL_ROWS]


def _feature_values(col: pa.Array) -> np.ndarray:
    """A feature column as float64 values, nulls as NaN, viewed without a copy where it
    can be. (Not ``Array.to_numpy``: on record batches read from Parquet its first call
    imports pandas, 0.5 s.)"""
    if col.type != pa.float64():
        col = col.cast(pa.float64(), safe=False)  # integers past 2**53 round
    if col.null_count:
        col = pc.fill_null(col, np.nan)
    return np.frombuffer(col.buffers()[1], dtype=np.float64, count=len(col),
                         offset=col.offset * 8)


def _decoded_bytes(batch: pa.RecordBatch) -> int:
    """Bytes ``batch`` takes once its dictionary columns are decoded (counted, not done)."""
    total = 0
    for col in batch.columns:
        if pa.types.is_dictionary(col.type) and (pa.types.is_string(col.type.value_type)
                                                 or pa.types.is_binary(col.type.value_type)):
            try:
                lengths = pc.take(pc.binary_length(col.dictionary), col.indices)
            except (pa.ArrowIndexError, pa.ArrowInvalid) as exc:  # an index past the
                raise _explain(exc, "parquet") from exc              # dictionary (damaged)
            total += int(pc.sum(lengths).as_py() or 0) + 4 * (len(col) + 1)
        else:
            total += col.nbytes
    return total


def _decode_dictionaries(batch: pa.RecordBatch) -> pa.RecordBatch:
    if not any(pa.types.is_dictionary(t) for t in batch.schema.types):
        return batch
    cols = [c.dictionary_decode() if pa.types.is_dictionary(c.type) else c
            for c in batch.columns]
    return pa.RecordBatch.from_arrays(cols, names=batch.schema.names)


def _plain(field: pa.Field) -> pa.Field:
    return field.with_type(field.type.value_type) if pa.types.is_dictionary(field.type) \
        else field


def _guard(batches, kind: str):
    """Re-raise reader errors met while iterating as InputRejected."""
    it = iter(batches)
    while True:
        try:
            batch = next(it)
        except StopIteration:
            return
        except InputRejected:
            raise
        except (pa.ArrowException, OSError, EOFError, ValueError) as exc:
            raise _explain(exc, kind) from exc
        yield batch


# -- Parquet ---------------------------------------------------------------------
def _parquet_batches(f: BinaryIO, settings: Settings):
    f.seek(0, io.SEEK_END)
    size = f.tell()
    f.seek(0)
    head = f.read(4)
    f.seek(max(size - 4, 0))
    tail = f.read(4)
    f.seek(0)
    if size < 12 or head != b"PAR1" or tail != b"PAR1":
        raise InputRejected("truncated_parquet", "not a complete Parquet file (the 'PAR1' "
                            "magic is missing at its start or end)")
    f.seek(max(size - 8, 0))
    footer = int.from_bytes(f.read(4), "little")
    f.seek(0)
    if footer > _FOOTER_LIMIT:
        # parsing a footer takes ~10 times its size in memory (200,000 one-row row
        # groups: a 108 MB footer, 1.5 GB to read); refused before it is parsed
        raise InputRejected("too_much_metadata", f"the Parquet footer is {footer} bytes, more "
                            f"than {_FOOTER_LIMIT} (too many row groups or columns: write "
                            "larger row groups)", limit=_FOOTER_LIMIT)
    source = _arrow_source(f)
    try:
        return _parquet_open(source, settings)
    except BaseException:
        if source is not f:
            source.close()
        raise


def _parquet_open(source, settings: Settings):
    try:
        # Strings are read as dictionaries, so that what they decode to is counted
        # against limits.max_data_bytes before it is made.
        # buffer_size, no pre_buffer: column chunks are read in pieces, not whole, so
        # memory is bounded whatever the row-group size (1,000,000-row groups, 17 columns:
        # peak RSS of a bare read 272 MB with pyarrow's defaults, 166 MB this way)
        pf = _parquet_file(source, list(settings.passthrough))
    except (pa.ArrowException, OSError, ValueError) as exc:  # ArrowNotImplementedError too
        raise InputRejected("bad_parquet", f"Parquet metadata cannot be read: {exc}") from exc
    except KeyError as exc:  # read_dictionary names a passthrough column the file lacks
        # (or holds as a pandas RangeIndex, or in a nested type it cannot read that way)
        pf = _parquet_plain(source)
        name = exc.args[0].decode("utf-8", "replace") if exc.args and \
            isinstance(exc.args[0], bytes) else str(exc)
        ranges = _pandas_range_index(pf.schema_arrow, settings)
        if name not in ranges:
            _check_nested(pf.schema_arrow, settings)
            raise InputRejected("missing_column", f"passthrough column {name!r} is missing",
                                column=name) from exc
        pf = _parquet_file(source, [c for c in settings.passthrough if c not in ranges])
    schema = pf.schema_arrow
    ranges = _pandas_range_index(schema, settings)
    if len(schema.names) > settings.limits.max_columns:
        raise InputRejected("too_many_columns", f"{len(schema.names)} columns, more than "
                            f"limits.max_columns={settings.limits.max_columns}")
    chunks = pf.metadata.num_row_groups * max(pf.metadata.num_columns, 1)
    if chunks > _COLUMN_CHUNK_LIMIT:
        raise InputRejected("too_much_metadata", f"{pf.metadata.num_row_groups} row groups of "
                            f"{pf.metadata.num_columns} columns, more than "
                            f"{_COLUMN_CHUNK_LIMIT} column chunks: write larger row groups",
                            limit=_COLUMN_CHUNK_LIMIT)
    if pf.metadata.num_rows > settings.limits.max_rows:
        raise InputRejected("too_many_rows", f"{pf.metadata.num_rows} rows, more than "
                            f"limits.max_rows={settings.limits.max_rows}")
    _check_columns(schema.names + list(ranges), settings)
    _check_nested(schema, settings)
    declared = _parquet_data_bytes(pf.metadata)
    if declared > settings.limits.max_data_bytes:
        raise _too_much_data(declared, settings, " (declared in the Parquet footer)")
    for name in settings.features:
        t = schema.field(name).type
        if not (pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t)
                or pa.types.is_null(t)):   # a column of nulls only: rows without a value
            raise InputRejected("non_numeric_feature",
                                f"feature column {name!r} has type {t}, expected a number",
                                column=name)
    batches = pf.iter_batches(batch_size=BATCH_ROWS,
                              columns=[c for c in settings.columns if c not in ranges],
                              use_threads=False)
    if ranges:
        batches = _with_range_index(batches, ranges)
        for name in ranges:
            schema = schema.append(pa.field(name, pa.int64()))
    return _closing(batches, source), schema


def _pandas_range_index(schema: pa.Schema, settings: Settings) -> dict[str, tuple[int, int]]:
    """Pass-through columns that a file written by pandas holds as its RangeIndex (kept
    in the pandas metadata only, as start and step): name -> (start, step)."""
    raw = (schema.metadata or {}).get(b"pandas")
    if raw is None:
        return {}
    try:
        index = json.loads(raw).get("index_columns", [])
    except (ValueError, AttributeError):
        return {}
    out = {}
    for entry in index:
        if isinstance(entry, dict) and entry.get("kind") == "range" and \
                entry.get("name") in settings.passthrough and \
                entry["name"] not in schema.names:
            out[entry["name"]] = (int(entry.get("start", 0)), int(entry.get("step", 1)))
    return out


def _with_range_index(batches, ranges: dict[str, tuple[int, int]]):
    """``batches`` with the pandas RangeIndex columns made from their start and step."""
    at = 0
    for batch in batches:
        arrays, names = list(batch.columns), list(batch.schema.names)
        for name, (start, step) in ranges.items():
            arrays.append(pa.array(start + step * np.arange(at, at + batch.num_rows,
                                                            dtype=np.int64)))
            names.append(name)
        at += batch.num_rows
        yield pa.RecordBatch.from_arrays(arrays, names=names)


def _check_nested(schema: pa.Schema, settings: Settings) -> None:
    """A pass-through column of a nested type (struct, list, map) cannot be passed on."""
    for name in settings.passthrough:
        if name in schema.names:
            t = schema.field(name).type
            if pa.types.is_nested(t):
                raise InputRejected("unsupported_type", f"passthrough column {name!r} has "
                                    f"type {t}, an unsupported type (struct, list and map "
                                    "columns cannot be passed through)", column=name)


def _parquet_file(source, dictionary: list[str]) -> pq.ParquetFile:
    return pq.ParquetFile(source, read_dictionary=dictionary,
                          buffer_size=_PARQUET_BUFFER, pre_buffer=False,
                          thrift_string_size_limit=_THRIFT_STRING_LIMIT,
                          thrift_container_size_limit=_THRIFT_CONTAINER_LIMIT)


def _parquet_plain(source) -> pq.ParquetFile:
    """The file opened again without dictionaries, to say why the first open failed."""
    try:
        return _parquet_file(source, [])
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise InputRejected("bad_parquet", f"Parquet metadata cannot be read: {exc}") from exc


def _closing(batches, source):
    """``batches``, closing ``source`` (an Arrow file of our own) when done or dropped."""
    try:
        yield from batches
    finally:
        if isinstance(source, pa.NativeFile):
            source.close()


def _arrow_source(f: BinaryIO):
    """``f`` as a file Arrow reads itself (without the interpreter lock and without copies
    into Python bytes: ~15% less CPU to decode a Parquet file), reopened through
    /proc/self/fd so that it is the very file ``f`` holds open (not whatever its name
    now points to); ``f`` itself where that is not possible."""
    try:
        fd = f.fileno()
        source = pa.OSFile(f"/proc/self/fd/{fd}")
    except (OSError, AttributeError, ValueError, pa.ArrowException):
        return f
    try:
        same = os.fstat(fd)
        st = os.stat(f"/proc/self/fd/{fd}")
        if (st.st_dev, st.st_ino) == (same.st_dev, same.st_ino):
            return source
    except OSError:
        pass
    source.close()
    return f


def _parquet_data_bytes(meta: pq.FileMetaData) -> int:
    """Uncompressed bytes of all columns that the footer declares, summed over row groups.

    Row-group totals, not column chunks: pyarrow 26 aborts the process (an uncaught
    C++ exception) when ``RowGroupMetaData.column(i)`` meets some damaged footers.
    """
    return sum(meta.row_group(g).total_byte_size for g in range(meta.num_row_groups))


def _too_much_data(n: int, settings: Settings, where: str = "") -> InputRejected:
    limit = settings.limits.max_data_bytes
    return InputRejected("too_much_data", f"{n} bytes of data{where}, more than "
                         f"limits.max_data_bytes={limit}", limit=limit)


# -- CSV -------------------------------------------------------------------------
class _InflateGuard(io.RawIOBase):
    """A gzip stream that refuses to inflate past ``limits.max_data_bytes`` or past
    ``limits.max_gzip_ratio`` times the compressed bytes consumed (a decompression bomb),
    before the inflated bytes reach the CSV reader."""

    def __init__(self, raw: BinaryIO, settings: Settings):
        self.raw = raw
        self.limits = settings.limits
        self.settings = settings
        self.inflated = 0
        self.gz = gzip.GzipFile(fileobj=raw, mode="rb")

    def readable(self) -> bool:
        return True

    def seekable(self) -> bool:
        return True

    def seek(self, offset: int, whence: int = io.SEEK_SET) -> int:
        if (offset, whence) != (0, io.SEEK_SET):
            raise io.UnsupportedOperation("only a rewind to the start")
        self.gz.seek(0)
        self.inflated = 0
        return 0

    def tell(self) -> int:
        return self.inflated

    def readinto(self, buffer) -> int:
        try:
            n = self.gz.readinto(buffer)
        except (OSError, EOFError, zlib.error) as exc:   # gzip.BadGzipFile is an OSError
            raise InputRejected("bad_compression", f"cannot be decompressed after "
                                f"{self.inflated} bytes: {type(exc).__name__}: {exc}") from exc
        self.inflated += n
        if self.inflated > self.limits.max_data_bytes:
            raise _too_much_data(self.inflated, self.settings, " after decompression")
        consumed = max(self.raw.tell(), 1)
        if self.inflated > _INFLATE_FREE and self.inflated > self.limits.max_gzip_ratio * consumed:
            raise InputRejected(
                "decompression_bomb", f"{consumed} compressed bytes inflate to more than "
                f"{self.inflated} (ratio over limits.max_gzip_ratio="
                f"{self.limits.max_gzip_ratio:g})", limit=self.limits.max_gzip_ratio)
        return n


def _csv_header(stream: BinaryIO, delimiter: str = ",") -> list[str]:
    """The header's names. A line ends at LF, CR LF or a lone CR, as Arrow's CSV reader
    ends it (files from old Mac tools end every line with a CR alone)."""
    try:
        line = stream.readline(_HEADER_LIMIT)
    except (OSError, EOFError) as exc:
        raise InputRejected("bad_compression", f"cannot be decompressed: {exc}") from exc
    if not line:
        raise InputRejected("empty", "the input is empty (no header line)")
    end = len(line)
    for mark in (b"\r", b"\n"):
        at = line.find(mark)
        if at >= 0:
            end = min(end, at)
    if end == len(line) and len(line) >= _HEADER_LIMIT:
        raise InputRejected("bad_header", f"header line longer than {_HEADER_LIMIT} bytes")
    line = line[:end]
    try:
        text = line.decode("utf-8-sig")  # a byte-order mark is not part of the first name
    except UnicodeDecodeError as exc:
        raise InputRejected("encoding", f"line 1 (header) is not UTF-8: byte "
                            f"{line[exc.start]:#04x} at position {exc.start}", line=1) from exc
    try:
        return next(csv.reader([text], delimiter=delimiter), [])
    except csv.Error as exc:   # a name past the csv module's field limit (128 KiB) ...
        raise InputRejected("bad_header", f"line 1 (header) cannot be parsed: {exc}",
                            line=1) from exc


def _csv_batches(stream: BinaryIO, settings: Settings, tab: bool = False,
                 skipped: list[int] | None = None):
    """Record batches of a CSV input (``tab``: a .tsv file). With ``input.bad_rows:
    skip``, rows with the wrong number of fields or a feature value that is no number
    are left out and their line numbers added to ``skipped``."""
    given = settings.input
    delimiter = "\t" if tab else given.delimiter
    if given.columns:            # no header line: the configured names
        header = list(given.columns)
    else:
        header = _csv_header(stream, delimiter)
    if len(header) > settings.limits.max_columns:
        raise InputRejected("too_many_columns", f"{len(header)} columns, more than "
                            f"limits.max_columns={settings.limits.max_columns}")
    _check_columns(header, settings)
    stream.seek(0)
    skip = given.bad_rows == "skip" and skipped is not None
    # skipping: the features are read as text and converted here, so that a value that
    # is no number marks its row rather than failing the whole block
    types = {c: pa.string() if skip else pa.float64() for c in settings.features}
    types.update({c: pa.string() for c in settings.passthrough})
    width: list[int] = []

    def bad_width(row) -> str:
        width.append(row.number if row.number is not None else -1)
        return "skip"

    try:
        reader = pacsv.open_csv(
            stream,
            read_options=pacsv.ReadOptions(use_threads=False, block_size=_CSV_BLOCK,
                                           column_names=header if given.columns else None),
            parse_options=pacsv.ParseOptions(newlines_in_values=False, delimiter=delimiter,
                                             invalid_row_handler=bad_width if skip else None),
            convert_options=pacsv.ConvertOptions(
                column_types=types, include_columns=list(settings.columns),
                decimal_point=given.decimal,
                # pass-through strings are never null; a quoted empty feature ("") is,
                # as an unquoted one is (writers that quote every field make those)
                strings_can_be_null=False, quoted_strings_can_be_null=True))
    except (pa.ArrowInvalid, pa.ArrowKeyError, OSError, EOFError) as exc:
        raise _explain(exc, "csv", header) from exc
    batches = _CsvBatches(reader, header)
    schema = reader.schema
    if skip:
        first = 1 if given.columns else 2
        batches = _skipping(batches, settings, width, skipped, first)
        schema = pa.schema([schema.field(n).with_type(pa.float64())
                            if n in settings.features else schema.field(n)
                            for n in schema.names])
    return batches, schema


class _CsvBatches:
    def __init__(self, reader, header):
        self.reader, self.header = reader, header

    def __iter__(self):
        try:
            yield from self.reader
        except (pa.ArrowInvalid, pa.ArrowKeyError, OSError, EOFError) as exc:
            raise _explain(exc, "csv", self.header) from exc


# a number as Arrow's CSV reader parses one (after a decimal comma became a point)
_NUMBER = r"^[+-]?(([0-9]+\.?[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?|inf|infinity|nan)$"


def _skipping(batches, settings: Settings, width: list[int], skipped: list[int],
              first_line: int):
    """CSV batches (features as text) with the rows whose features are not numbers left
    out, features as float64; every skipped row's line goes to ``skipped`` (rows of the
    wrong width, which the reader left out, too). An empty feature value stays: null."""
    row = 0          # data rows the reader gave so far
    told = 0         # of ``width``, lines already put in ``skipped``
    for batch in batches:
        columns, bad = {}, np.zeros(batch.num_rows, dtype=bool)
        for name in settings.features:
            col = pc.utf8_trim_whitespace(batch.column(name))
            col = pc.if_else(pc.equal(col, ""), pa.scalar(None, pa.string()), col)
            if settings.input.decimal == ",":
                col = pc.replace_substring(col, ",", ".")
            ok = pc.fill_null(pc.match_substring_regex(col, _NUMBER, ignore_case=True), True)
            bad |= ~ok.to_numpy(zero_copy_only=False)
            columns[name] = pc.if_else(ok, col, pa.scalar(None, pa.string()))
        new_width = sorted(w for w in width[told:] if w >= 0)
        told = len(width)
        skipped.extend(new_width)
        if bad.any():
            skipped.extend(_lines(np.flatnonzero(bad) + row, first_line, skipped))
        row += batch.num_rows
        arrays = [pc.cast(columns[n], pa.float64()) if n in columns else batch.column(n)
                  for n in batch.schema.names]
        out = pa.RecordBatch.from_arrays(arrays, names=batch.schema.names)
        yield out.filter(pa.array(~bad)) if bad.any() else out
    skipped.extend(sorted(w for w in width[told:] if w >= 0))
    skipped.sort()


def _lines(rows: np.ndarray, first_line: int, skipped: list[int]) -> list[int]:
    """The file lines of data rows ``rows`` (0-based among the rows read), given the
    lines the reader itself left out (``skipped``, the wrong-width rows)."""
    gone = sorted(skipped)
    out = []
    for r in rows.tolist():
        line = first_line + r
        for g in gone:       # each line left out before it moves it down one
            if g <= line:
                line += 1
        out.append(line)
    return out


def _check_columns(names: list[str], settings: Settings) -> None:
    present = set(names)
    for name in settings.columns:
        if name not in present:
            role = "feature" if name in settings.features else "passthrough"
            shown = ", ".join(repr(n) for n in names[:20]) + (" ..." if len(names) > 20 else "")
            raise InputRejected("missing_column",
                                f"{role} column {name!r} is missing; the input has {shown}",
                                column=name)
    seen: set[str] = set()
    dupes = sorted({n for n in names if n in settings.columns and (n in seen or seen.add(n))})
    if dupes:
        raise InputRejected("duplicate_column", f"column {dupes[0]!r} appears more than once",
                            column=dupes[0])


_ROW_WIDTH = re.compile(r"Row #(\d+): Expected (\d+) columns, got (\d+)")
_CONVERT = re.compile(r"In CSV column #(\d+): Row #(\d+): CSV conversion error to (\w+): (.*)")


def _explain(exc: Exception, kind: str, header: list[str] | None = None) -> InputRejected:
    """A reader error as a reason code and a detail that names the line or column."""
    msg = str(exc)
    if kind.startswith(("csv", "tsv")):
        m = _ROW_WIDTH.search(msg)
        if m:
            line, want, got = (int(g) for g in m.groups())
            return InputRejected("bad_row", f"line {line}: expected {want} fields, found {got}",
                                 line=line)
        m = _CONVERT.search(msg)
        if m:
            idx, line, target, what = int(m.group(1)), int(m.group(2)), m.group(3), m.group(4)
            col = header[idx] if header and idx < len(header) else f"#{idx}"
            if "UTF8" in what:
                return InputRejected("encoding", f"line {line}, column {col!r}: not UTF-8",
                                     line=line, column=col)
            return InputRejected("non_numeric_feature" if target == "double" else "bad_value",
                                 f"line {line}, column {col!r}: {what}, expected a number",
                                 line=line, column=col)
        if isinstance(exc, (OSError, EOFError)) and kind.endswith(".gz"):
            return InputRejected("bad_compression", f"cannot be decompressed: {msg}")
        if "UTF8" in msg or "UTF-8" in msg:
            return InputRejected("encoding", f"not UTF-8: {msg}")
        return InputRejected("bad_csv", msg)
    return InputRejected("bad_parquet", f"Parquet data cannot be read: {msg}")
