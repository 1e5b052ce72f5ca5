"""One labels schema per stream: the pass-through columns keep one type in every labels
file of a state folder.

The types are fixed by ``passthrough_types`` in the config where given, else by the
stream's first input: a Parquet column keeps its type; a CSV column (read as text) is
``int64`` when all its values are integers, ``float64`` when all are numbers, else
``string``. They are kept in the state store with the stream and every later input's
pass-through columns are converted to them (an empty CSV value is null). An input with
a value that cannot be converted is refused (``bad_value``, with the column and line).

shoal's own labels columns are defined by shoal's version; :data:`LABELS_SCHEMA_VERSION`
(in each labels file's metadata as ``shoal.labels_schema_version``) counts their
changes.
"""
from __future__ import annotations

import base64
from typing import Iterable, Iterator

import pyarrow as pa
import pyarrow.compute as pc

from shoal.daemon.errors import InputRejected

__all__ = ["LABELS_SCHEMA_VERSION", "PASSTHROUGH_TYPES", "conform", "first_schema",
           "schema_text", "schema_from_text", "Conformer"]

LABELS_SCHEMA_VERSION = 1
# the types a pass-through column may be given in the config
PASSTHROUGH_TYPES = {"string": pa.string(), "int64": pa.int64(), "float64": pa.float64(),
                     "bool": pa.bool_(), "timestamp": pa.timestamp("us", tz="UTC"),
                     "date": pa.date32()}


def schema_text(schema: pa.Schema) -> str:
    """A schema as text for the state store (Arrow's IPC form, base64)."""
    return base64.b64encode(schema.serialize().to_pybytes()).decode("ascii")


def schema_from_text(text: str) -> pa.Schema:
    return pa.ipc.read_schema(pa.py_buffer(base64.b64decode(text)))


def _empty_as_null(col: pa.Array) -> pa.Array:
    if pa.types.is_string(col.type) or pa.types.is_large_string(col.type):
        return pc.if_else(pc.equal(col, ""), pa.scalar(None, col.type), col)
    return col


def first_schema(table: pa.Table, from_text: bool, configured: dict[str, str]) -> pa.Schema:
    """The pass-through types fixed by a stream's first input (``table``: its first
    rows); ``from_text``: read from CSV, whose values are all text."""
    fields = []
    for field in table.schema:
        if field.name in configured:
            fields.append(field.with_type(PASSTHROUGH_TYPES[configured[field.name]]))
            continue
        if not from_text:
            fields.append(field)
            continue
        col = _empty_as_null(table.column(field.name).combine_chunks())
        chosen = pa.string()
        for candidate in (pa.int64(), pa.float64()):
            try:
                pc.cast(pc.utf8_trim_whitespace(col), candidate)
            except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
                continue
            chosen = candidate
            break
        fields.append(field.with_type(chosen))
    return pa.schema(fields)


def conform(table: pa.Table, schema: pa.Schema, from_text: bool,
            first_line: int) -> pa.Table:
    """``table`` with its columns converted to ``schema``; ``first_line``: the input's
    line (CSV) or row (Parquet, from 1) of the table's first row, for the message."""
    if table.schema.equals(schema, check_metadata=False):
        return table
    arrays = []
    for field in schema:
        col = table.column(field.name).combine_chunks()
        if from_text:
            col = _empty_as_null(col)
            if not pa.types.is_string(field.type):
                col = pc.utf8_trim_whitespace(col)
        if col.type != field.type:
            try:
                col = pc.cast(col, field.type)
            except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as exc:
                raise _refusal(col, field, from_text, first_line) from exc
        arrays.append(col)
    return pa.Table.from_arrays(arrays, schema=schema)


def _refusal(col: pa.Array, field: pa.Field, from_text: bool,
             first_line: int) -> InputRejected:
    """The first value of ``col`` that does not convert to ``field``'s type, named."""
    at, value = 0, None
    for i, v in enumerate(col.to_pylist()):
        try:
            pc.cast(pa.array([v], col.type), field.type)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            at, value = i, v
            break
    where = "line" if from_text else "row"
    line = first_line + at
    return InputRejected("bad_value", f"{where} {line}, column {field.name!r}: {value!r} is "
                         f"not {field.type}, the column's type in this stream's labels "
                         "(fixed by its first input or passthrough_types)",
                         line=line, column=field.name)


class Conformer:
    """Converts one input's frames to the stream's pass-through schema (fixing it from
    the first frame when the stream has none yet: :attr:`fixed` is then the new schema)."""

    def __init__(self, schema: pa.Schema | None, kind: str, configured: dict[str, str]):
        self.schema = schema
        self.fixed: pa.Schema | None = None
        self.from_text = kind != "parquet"
        self.configured = configured
        # CSV: line 1 is the header (no line holds a line break: newlines_in_values off)
        self.line = 2 if self.from_text else 1

    def frames(self, frames: Iterable) -> Iterator:
        for frame in frames:
            if self.schema is None:
                self.schema = self.fixed = first_schema(frame.passthrough, self.from_text,
                                                        self.configured)
            frame.passthrough = conform(frame.passthrough, self.schema, self.from_text,
                                        self.line)
            self.line += frame.n_rows
            yield frame
