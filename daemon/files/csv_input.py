"""CSV and TSV inputs (plain or gzip): the header, typed record batches, and bad rows.

Columns are read with explicit types (features as float64, pass-through columns as
strings), only the configured ones. A ``.gz`` input is inflated through
:class:`InflateGuard`, which refuses a decompression bomb before its bytes reach the
parser. With ``input.bad_rows: skip`` a row of the wrong width or with a feature that
is no number is left out and its line number reported, instead of refusing the file.
"""
from __future__ import annotations

import csv
import gzip
import io
import zlib
from typing import BinaryIO

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv

from shoal.config import Settings
from shoal.daemon.errors import InputRejected
from shoal.daemon.files.refusals import check_columns, explain_reader_error, too_much_data

__all__ = ["csv_batches", "InflateGuard"]

_CSV_BLOCK = 1 << 20
_HEADER_LIMIT = 1 << 20
# A .csv.gz may inflate this much whatever its ratio (small files compress well).
_INFLATE_FREE = 16 << 20


class InflateGuard(io.RawIOBase):
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
            raise too_much_data(self.inflated, self.settings, " after decompression")
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


def csv_batches(stream: BinaryIO, settings: Settings, tab: bool = False,
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
    check_columns(header, settings)
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
        raise explain_reader_error(exc, "csv", header) from exc
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
            raise explain_reader_error(exc, "csv", self.header) from exc


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
