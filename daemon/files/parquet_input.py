"""Parquet inputs: the footer checked before it is parsed, then record batches read in bounded memory.

A file is refused before its data is read when its magic, footer size, column chunks,
rows, columns or declared bytes pass the limits; strings are read as dictionaries so
their decoded size is counted before it is made; column chunks are read in pieces
through a small buffer, so memory stays bounded whatever the row-group size. A
pandas RangeIndex named as a pass-through column is rebuilt from the metadata.
"""
from __future__ import annotations

import io
import json
import os
from typing import BinaryIO

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from shoal.config import Settings
from shoal.daemon.errors import InputRejected
from shoal.daemon.files.frame import BATCH_ROWS
from shoal.daemon.files.refusals import check_columns, too_much_data

__all__ = ["parquet_batches"]

# Read buffer per Parquet column chunk. A page larger than the buffer is read straight
# into its own buffer, a smaller one through the buffer (a copy): with 64 KiB, pyarrow's
# usual 1 MiB pages skip that copy and the buffers of a few dozen columns stay in L2.
_PARQUET_BUFFER = 64 << 10
# Parquet footers: Thrift strings and lists past these are refused by the parser.
_THRIFT_STRING_LIMIT = 16 << 20
_THRIFT_CONTAINER_LIMIT = 1 << 20
# Parquet footers past this many bytes, or with more column chunks (row groups x
# columns) than this, are refused unparsed (parsing one takes several times its size).
_FOOTER_LIMIT = 8 << 20
_COLUMN_CHUNK_LIMIT = 100_000


def parquet_batches(f: BinaryIO, settings: Settings):
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
        # parsing a footer takes many times its size in memory (a file of many tiny
        # row groups has a huge footer); refused before it is parsed
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
        # memory is bounded whatever the row-group size (pyarrow's defaults would hold
        # whole column chunks of a large row group at once)
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
    check_columns(schema.names + list(ranges), settings)
    _check_nested(schema, settings)
    declared = _parquet_data_bytes(pf.metadata)
    if declared > settings.limits.max_data_bytes:
        raise too_much_data(declared, settings, " (declared in the Parquet footer)")
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
    into Python bytes, which costs CPU on every page), reopened through
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
