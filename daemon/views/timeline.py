"""The x axis of the report's and the status page's plots, and what is marked on it.

Operators think in the data's own time, not in the time a file happened to be
committed: a backfill of a year of history is committed within minutes. So each
committed input (one model version) gets a place on the x axis:

- with ``drift.time_column``: the newest time in that input's rows, read from its
  labels file (the column is passed through; a Parquet labels file's footer
  statistics give it without reading the rows);
- without one: the stream row at the end of that input (the ledger's row counts
  added up), with the input names as ticks when few enough inputs are shown.

The labels file also gives each input's mean log-density per row, from which the
fit panel draws ``fit_drop`` (the baseline's mean log-density per row minus the
input's). Labels files are named by their input's content digest and never change,
so what is read from one is kept (:data:`_FACTS`) and read once per process.

Events drawn on every time axis: re-baselines (the ``rebaselines`` table) and the
segments' lifecycle events (history rows with an ``event``: born, retired, merged,
split).
"""
from __future__ import annotations

import datetime as _dt
import math
import re
import threading
from collections import OrderedDict
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from shoal.daemon.errors import UsageError
from shoal.daemon.files.times import date_as_timestamp, row_times

__all__ = ["Axis", "InputFacts", "input_facts", "build_axis", "parse_bound", "event_kind",
           "EVENT_KINDS", "axis_events"]

# Lifecycle and baseline events, in the order of the legend.
EVENT_KINDS = ("rebaseline", "born", "retired", "merged", "split")


@dataclass(frozen=True)
class InputFacts:
    """What one labels file says about its input: the span of its time column (epoch
    seconds, or the column's own numbers) and its rows' mean log-density per row."""
    time_first: float | None
    time_last: float | None
    mean_log_density: float | None
    numeric: bool = False      # the time column holds plain numbers, not dates


_FACTS: "OrderedDict[tuple, InputFacts]" = OrderedDict()
_FACTS_LOCK = threading.Lock()
_FACTS_KEPT = 100_000


def _to_seconds(column: pa.ChunkedArray | pa.Array) -> tuple[np.ndarray, bool]:
    """A time column as float seconds since the epoch (UTC) for timestamps, dates and
    ISO text, or as the numbers themselves for a numeric column (or text of numbers,
    as CSV passes it through); NaN where there is no time. Also: whether numeric."""
    t = column.type
    if pa.types.is_date(t):
        column, t = date_as_timestamp(column), pa.timestamp("ms")
    if pa.types.is_timestamp(t):
        ms = pc.cast(column, pa.timestamp("ms", tz=t.tz))
        values = ms.cast(pa.int64()).to_numpy(zero_copy_only=False)
        return np.asarray(_with_nans(ms, values), dtype=float) / 1000.0, False
    if pa.types.is_integer(t) or pa.types.is_floating(t):
        return np.asarray(_with_nans(column, column.cast(pa.float64()).to_numpy(
            zero_copy_only=False)), dtype=float), True
    try:
        as_numbers = pc.cast(column, pa.float64())
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        values = column.to_pylist()
        return np.array([_iso_seconds(v) for v in values], dtype=float), False
    return np.asarray(_with_nans(as_numbers, as_numbers.to_numpy(zero_copy_only=False)),
                      dtype=float), True


def _with_nans(column, values) -> np.ndarray:
    """``values`` (numpy, from ``column``) with NaN where ``column`` is null."""
    out = np.asarray(values, dtype=float)
    if column.null_count:
        out = out.copy()
        out[np.asarray(column.is_null().to_numpy(zero_copy_only=False), bool)] = np.nan
    return out


def _iso_seconds(value: Any) -> float:
    if value is None:
        return math.nan
    if isinstance(value, _dt.datetime):
        when = value
    else:
        try:
            when = _dt.datetime.fromisoformat(str(value).strip().replace("Z", "+00:00"))
        except ValueError:
            return math.nan
    if when.tzinfo is None:
        when = when.replace(tzinfo=_dt.timezone.utc)
    return when.timestamp()


def _read_facts(path: Path, time_column: str | None, time_unit: str | None = None,
                time_format: str | None = None) -> InputFacts:
    columns = ["log_density"] + ([time_column] if time_column else [])
    if path.name.endswith(".csv"):
        table = pacsv.read_csv(path, convert_options=pacsv.ConvertOptions(
            include_columns=columns, include_missing_columns=True))
    else:
        names = set(pq.read_schema(path).names)
        table = pq.read_table(path, columns=[c for c in columns if c in names])
    ld = (np.asarray(table.column("log_density").to_numpy(zero_copy_only=False), float)
          if "log_density" in table.column_names else np.empty(0))
    ld = ld[np.isfinite(ld)]
    first = last = None
    numeric = False
    if time_column and time_column in table.column_names:
        if time_unit is not None or time_format is not None:
            # read as the drift alerts read it: epoch numbers in drift.time_unit, text
            # in drift.time_format (shoal.daemon.files.times)
            instants = row_times(table.column(time_column), time_unit, time_format).values
            secs = np.where(np.isnat(instants), np.nan,
                            instants.astype(np.int64) / 1e6)
            numeric = False
        else:
            secs, numeric = _to_seconds(table.column(time_column))
        secs = secs[np.isfinite(secs)]
        if secs.size:
            first, last = float(secs.min()), float(secs.max())
    return InputFacts(first, last, float(ld.mean()) if ld.size else None, numeric)


def input_facts(path: Path, time_column: str | None, time_unit: str | None = None,
                time_format: str | None = None) -> InputFacts | None:
    """The facts of one labels file (None when it is gone or unreadable), kept per name;
    ``time_unit``/``time_format`` as in ``drift`` (either given: the column is read as
    the drift alerts read it; neither: numbers are the column's own units)."""
    key = (str(path), time_column, time_unit, time_format)
    with _FACTS_LOCK:
        got = _FACTS.get(key)
    if got is not None:
        return got
    try:
        got = _read_facts(path, time_column, time_unit, time_format)
    except (OSError, pa.ArrowException, ValueError):
        return None
    with _FACTS_LOCK:
        _FACTS[key] = got
        while len(_FACTS) > _FACTS_KEPT:
            _FACTS.popitem(last=False)
    return got


@dataclass
class Axis:
    """Where each model version sits on the x axis, and how to label it.

    ``kind`` is ``"time"`` (x in epoch seconds, drawn as UTC dates), ``"number"`` (a
    numeric time column, its own units) or ``"rows"`` (stream rows).
    """
    kind: str
    label: str
    x: dict[int, float] = field(default_factory=dict)       # model version -> x
    span: dict[int, tuple[float, float]] = field(default_factory=dict)  # version -> (lo, hi)
    names: dict[int, str] = field(default_factory=dict)     # model version -> input name
    fit: dict[int, float] = field(default_factory=dict)     # version -> mean log-density/row
    left_out: int = 0                                       # inputs without a readable time
    column: str | None = None                               # the time column, if on time

    @property
    def is_time(self) -> bool:
        return self.kind == "time"

    def of(self, version: int | None) -> float | None:
        return None if version is None else self.x.get(int(version))

    def describe(self, x: float) -> str:
        """One x value as the axis shows it."""
        if self.kind == "time":
            return _dt.datetime.fromtimestamp(x, _dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
        if self.kind == "rows":
            return f"row {int(x):,}"
        return f"{x:g}"

    def range(self) -> tuple[float, float] | None:
        lows = [lo for lo, _ in self.span.values()]
        highs = [hi for _, hi in self.span.values()]
        return (min(lows), max(highs)) if lows else None


def build_axis(entries: Sequence[Any], outbox: Path, time_column: str | None,
               rows_before: int = 0, time_unit: str | None = None,
               time_format: str | None = None) -> Axis:
    """The axis of the committed ledger ``entries`` (oldest first): data time when the
    time column is configured and readable in at least one labels file, else stream rows
    (counted from ``rows_before``, the rows of ledger rows removed by retention).

    Facts are read for every entry that has a labels file (the fit panel needs them
    whichever the axis).
    """
    rows_axis = Axis("rows", "stream rows (end of each input)")
    time_axis = None
    numeric: list[bool] = []
    total = int(rows_before)
    for e in entries:
        if e.model_version is None:
            continue
        v = int(e.model_version)
        start = total
        total += int(e.rows or 0)
        rows_axis.x[v] = float(total)
        rows_axis.span[v] = (float(start), float(total))
        rows_axis.names[v] = e.name
        facts = input_facts(outbox / e.labels, time_column, time_unit, time_format) \
            if e.labels else None
        if facts is None:
            continue
        if facts.mean_log_density is not None:
            rows_axis.fit[v] = facts.mean_log_density
        if facts.time_last is not None:
            if time_axis is None:
                time_axis = Axis("time", "")
            numeric.append(facts.numeric)
            time_axis.x[v] = facts.time_last
            time_axis.span[v] = (facts.time_first, facts.time_last)
    if time_axis is None:
        return rows_axis
    time_axis.names = rows_axis.names
    time_axis.fit = rows_axis.fit
    time_axis.left_out = sum(1 for v in rows_axis.x if v not in time_axis.x)
    time_axis.column = time_column
    if all(numeric):
        time_axis.kind = "number"
        time_axis.label = f"{time_column} (the time column's own units)"
    else:
        time_axis.label = f"data time, column {time_column} (UTC)"
    return time_axis


_DURATION = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(s|min|m|h|d|w)\s*$")
_UNIT_SECONDS = {"s": 1, "m": 60, "min": 60, "h": 3600, "d": 86400, "w": 604800}
_ROWS = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([kKmM]?)\s*$")


def parse_bound(text: str | None, axis: Axis, option: str = "--since") -> float | None:
    """``--since``/``--until`` in the axis' units.

    On data time: an ISO date/time (UTC if no zone) or a duration (``7d``, ``24h``,
    ``30min``) counted back from the newest data time. On stream rows: a row number
    (``250000``, ``250k``, ``1.5M``). On a numeric time column: a number.
    """
    if text is None:
        return None
    if axis.kind == "rows" or axis.kind == "number":
        m = _ROWS.match(text)
        if m is None:
            what = ("a stream row such as 250000, 250k or 1.5M (there is no "
                    "drift.time_column, so the plots are on stream rows)"
                    if axis.kind == "rows" else "a number in the time column's units")
            raise UsageError(f"{option}: expected {what}, found {text!r}")
        scale = {"": 1, "k": 1e3, "K": 1e3, "m": 1e6, "M": 1e6}[m.group(2)]
        return float(m.group(1)) * scale
    m = _DURATION.match(text)
    if m:
        newest = max(axis.x.values()) if axis.x else 0.0
        return newest - float(m.group(1)) * _UNIT_SECONDS[m.group(2)]
    when = _iso_seconds(text)
    if math.isnan(when):
        raise UsageError(f"{option}: expected a data time such as 2026-05-01T08:00 or a "
                         f"duration back from the newest data such as 7d, 24h or 30min, "
                         f"found {text!r}")
    return when


def event_kind(text: str) -> str | None:
    """The kind of a history row's event text ('born at row 10', 'merged into 2 ...');
    None for the surviving side of a merge ('absorbed ...'), which is marked once."""
    t = text.strip().lower()
    for kind in ("born", "retired", "merged", "split"):
        if t.startswith(kind):
            return kind
    return None


def axis_events(axis: Axis, history: Sequence[Mapping[str, Any]],
                rebaselines: Sequence[Mapping[str, Any]]) -> list[dict]:
    """Events to mark on the axis, oldest first: ``{"kind", "x", "version", "text"}``."""
    out = []
    for r in rebaselines:
        x = axis.of(r.get("model_version")) if r.get("applied") is not None else None
        if x is not None:
            out.append({"kind": "rebaseline", "x": x, "version": r["model_version"],
                        "text": r.get("note") or "re-baseline"})
    for h in history:
        for part in (h.get("event") or "").split(";"):
            kind = event_kind(part)
            x = axis.of(h["version"])
            if kind is not None and x is not None:
                out.append({"kind": kind, "x": x, "version": h["version"],
                            "text": f"segment {h['segment']} {part.strip()}"})
    out.sort(key=lambda e: (e["x"], EVENT_KINDS.index(e["kind"])))
    return out
