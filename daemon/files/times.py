"""Row times (``drift.time_column``) read as instants in UTC.

Whatever an input holds, a row's time becomes a ``datetime64[us]`` instant (NaT where
there is none), so times are compared as times and printed in ISO 8601 UTC:

- Arrow timestamps of any unit, with or without a zone (a zoned timestamp is stored
  in UTC; one without a zone is taken as UTC); dates as their midnight UTC;
- integers and decimals as time since the Unix epoch, in ``drift.time_unit`` (``s``,
  ``ms``, ``us``, ``ns``); without one, the unit is inferred from the largest
  magnitude (below 1e11 seconds, 1e14 milliseconds, 1e17 microseconds, else
  nanoseconds: the magnitudes of epoch times between 1973 and 5138, common practice)
  and the caller says so in the log;
- text: with ``drift.time_format``, a ``strptime`` format; else numbers as above when
  every value is one (CSV passes epoch times as text), else ISO 8601 (``Z`` or an
  offset, or none: UTC).

A value that cannot be read gives NaT and is counted (``unreadable``), never an error.
"""
from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

__all__ = ["RowTimes", "row_times", "TIME_UNITS", "iso_utc", "date_as_timestamp"]

TIME_UNITS = ("s", "ms", "us", "ns")
_US_PER = {"s": 1_000_000, "ms": 1_000, "us": 1, "ns": 1}   # ns: divided, below
# the largest magnitude of epoch times taken as each unit when none is configured
_INFER_BELOW = (("s", 1e11), ("ms", 1e14), ("us", 1e17))
# datetime64[us] spans +-2.9e5 years; values beyond this many microseconds are unreadable
_US_LIMIT = 9.2e18
_NAT = np.iinfo(np.int64).min


@dataclass(frozen=True)
class RowTimes:
    """Instants (``datetime64[us]``, NaT where none), the count of values present that
    could not be read, and the epoch unit inferred (None when configured or not numbers)."""
    values: np.ndarray
    unreadable: int = 0
    inferred_unit: str | None = None


def iso_utc(value: np.datetime64) -> str:
    """An instant as ISO 8601 UTC with milliseconds: ``2025-05-01T06:26:16.000Z``."""
    return str(np.datetime_as_string(value, unit="ms")) + "Z"


def date_as_timestamp(column):
    """A date column as millisecond timestamps at each day's midnight UTC."""
    return pc.cast(pc.cast(column, pa.date64()), pa.timestamp("ms"))


def row_times(column: pa.Array | pa.ChunkedArray, unit: str | None = None,
              fmt: str | None = None) -> RowTimes:
    """The instants of ``column`` (see the module's description)."""
    if isinstance(column, pa.ChunkedArray):
        column = column.combine_chunks() if column.num_chunks != 1 else column.chunk(0)
    t = column.type
    present = len(column) - column.null_count
    if pa.types.is_dictionary(t):
        column, t = column.dictionary_decode(), t.value_type
    if pa.types.is_string(t) or pa.types.is_large_string(t):   # empty text: no time
        column = pc.if_else(pc.equal(pc.utf8_trim_whitespace(column), ""),
                            pa.scalar(None, t), column)
        present = len(column) - column.null_count
    if pa.types.is_date(t):
        column, t = date_as_timestamp(column), pa.timestamp("ms")
    if pa.types.is_timestamp(t):
        return _finish(_from_epoch_ints(column.cast(pa.int64()), t.unit), present)
    if pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t):
        return _numbers(column, unit, present)
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        if fmt is not None:
            parsed = pc.strptime(column, format=fmt, unit="us", error_is_null=True)
            return _finish(_from_epoch_ints(parsed.cast(pa.int64()), "us"), present)
        for numbers in (pa.int64(), pa.float64()):
            try:
                return _numbers(pc.cast(pc.utf8_trim_whitespace(column), numbers), unit,
                                present)
            except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
                continue
        return _finish(_iso(column), present)
    return RowTimes(np.full(len(column), np.datetime64("NaT"), "datetime64[us]"), present)


def _finish(values: np.ndarray, present: int, inferred: str | None = None) -> RowTimes:
    read = int(np.count_nonzero(~np.isnat(values)))
    return RowTimes(values, present - read, inferred)


def _from_epoch_ints(ints: pa.Array, unit: str) -> np.ndarray:
    """Integers since the epoch in ``unit`` (nulls: NaT) as ``datetime64[us]``."""
    raw = pc.fill_null(ints, _NAT).to_numpy(zero_copy_only=False).astype(np.int64)
    missing = raw == _NAT
    if unit == "ns":
        us = np.floor_divide(raw, 1000)
    else:
        scale = _US_PER[unit]
        limit = np.iinfo(np.int64).max // scale
        missing |= np.abs(raw) > limit
        us = np.where(missing, 0, raw) * scale
    us[missing] = _NAT
    return us.view("datetime64[us]")


def _numbers(column: pa.Array, unit: str | None, present: int) -> RowTimes:
    inferred = None
    if unit is None:
        values = column.cast(pa.float64(), safe=False).to_numpy(zero_copy_only=False)
        finite = np.abs(values[np.isfinite(values)])
        top = float(finite.max()) if finite.size else 0.0
        unit = next((u for u, below in _INFER_BELOW if top < below), "ns")
        inferred = unit
    if pa.types.is_integer(column.type):
        return _finish(_from_epoch_ints(column.cast(pa.int64()), unit), present, inferred)
    values = column.cast(pa.float64(), safe=False).to_numpy(zero_copy_only=False)
    us = values * (_US_PER[unit] if unit != "ns" else 1e-3)
    bad = ~np.isfinite(us) | (np.abs(us) > _US_LIMIT)
    out = np.where(bad, 0, np.round(us)).astype(np.int64)
    out[bad] = _NAT
    return _finish(out.view("datetime64[us]"), present, inferred)


def _iso(column: pa.Array) -> np.ndarray:
    """ISO 8601 text as instants: Arrow's parser for a column all with zones or all
    without, else one value at a time."""
    for target in (pa.timestamp("us", tz="UTC"), pa.timestamp("us")):
        try:
            return _from_epoch_ints(pc.cast(column, target).cast(pa.int64()), "us")
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            continue
    out = np.full(len(column), _NAT, dtype=np.int64)
    epoch = _dt.datetime(1970, 1, 1, tzinfo=_dt.timezone.utc)
    for i, value in enumerate(column.to_pylist()):
        if value is None:
            continue
        try:
            when = _dt.datetime.fromisoformat(value.strip())
        except ValueError:
            continue
        if when.tzinfo is None:
            when = when.replace(tzinfo=_dt.timezone.utc)
        delta = when - epoch
        out[i] = (delta.days * 86_400 + delta.seconds) * 1_000_000 + delta.microseconds
    return out.view("datetime64[us]")
