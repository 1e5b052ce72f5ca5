"""What ``shoal report`` and the status page's plots show, gathered as plain data.

Reads, never draws: the state through :mod:`shoal.daemon.state.readout` (the segment
history, the alerts, the latest checkpoint's segments and baseline bands, the
checkpoints' baselines for the fit panel), each input's place on the x axis and its fit
from its labels file (:mod:`shoal.daemon.views.timeline`: data time when
``drift.time_column`` is set, else stream rows), and a seeded sample of recent rows
(the committed inputs in ``processed/``, or the inbox when inputs are kept, joined row
by row with their labels files). :mod:`shoal.daemon.views.report` draws the result.
"""
from __future__ import annotations

import datetime as _dt
import math
import re
import time
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from shoal.config import Settings
from shoal.core import Mixture
from shoal.daemon.errors import InputRejected, UsageError
from shoal.daemon.files.layout import Layout
from shoal.daemon.files.readers import read_input
from shoal.daemon.files.opening import open_input
from shoal.daemon.intake.gate import input_kind
from shoal.daemon.model.contract import settings_of_model
from shoal.daemon.model.transforming import centres, from_meta
from shoal.daemon.segments.segment_names import segment_names
from shoal.daemon.state.compacted import compacted_totals
from shoal.daemon.state.readout import (
    StateReader,
    checkpoint_extras,
    read_alerts,
    state_snapshot,
)
from shoal.daemon.views.timeline import Axis, axis_events, build_axis, parse_bound

__all__ = ["parse_since", "report_data", "recent_rows", "feature_units", "drift_bounds"]

_SINCE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(s|min|m|h|d|w)\s*$")

_UNIT_SECONDS = {"s": 1, "m": 60, "min": 60, "h": 3600, "d": 86400, "w": 604800}


def parse_since(text: str | None, now: float | None = None) -> float | None:
    """``'24h'``, ``'30min'``, ``'7d'`` (ago) or an ISO 8601 date/time (UTC if no zone)."""
    if text is None:
        return None
    now = time.time() if now is None else now
    m = _SINCE.match(text)
    if m:
        return now - float(m.group(1)) * _UNIT_SECONDS[m.group(2)]
    try:
        when = _dt.datetime.fromisoformat(text.strip())
    except ValueError:
        raise UsageError(f"--since: expected a duration such as 24h, 30min, 7d or an ISO "
                         f"date/time such as 2026-05-01T08:00, found {text!r}") from None
    if when.tzinfo is None:
        when = when.replace(tzinfo=_dt.timezone.utc)
    return when.timestamp()


def feature_units(settings: Settings) -> dict[str, str]:
    """Units per feature when the config gives them; 'data units' otherwise."""
    given = getattr(settings, "units", None) or {}
    return {f: str(given.get(f, "data units")) if isinstance(given, Mapping) else "data units"
            for f in settings.features}


def drift_bounds(settings: Settings) -> dict[str, float]:
    """Statistic -> bound from the config's drift bounds, when that section exists."""
    drift = getattr(settings, "drift", None)
    bounds = getattr(drift, "bounds", None)
    if bounds is None:
        return {}
    out = {}
    for name in getattr(bounds, "__dataclass_fields__", {}):
        value = getattr(bounds, name)
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            out[name] = float(value)
    return out


def _read_labels(path: Path) -> np.ndarray:
    if path.name.endswith(".csv"):
        table = pacsv.read_csv(path, convert_options=pacsv.ConvertOptions(
            include_columns=["segment"]))
    else:
        table = pq.read_table(path, columns=["segment"])
    col = table.column("segment").to_numpy(zero_copy_only=False)
    return np.where(np.isnan(col.astype(float)), -1, col).astype(np.int64)


def recent_rows(reader: StateReader, settings: Settings, layout: Layout, *,
                versions: set[int] | None = None, max_rows: int = 3000,
                max_inputs: int = 8) -> tuple[np.ndarray, np.ndarray]:
    """A seeded sample of recent rows (data units) and their segments (-1: none).

    Inputs (of ``versions`` when given) are found in ``processed/`` (or the inbox when
    inputs are kept) by name and checked against the ledger's size; an input that has
    gone is skipped.
    """
    entries = [e for e in reversed(reader.ledger("committed"))
               if e.labels and (versions is None or e.model_version in versions)][:max_inputs]
    xs, segs = [], []
    for e in entries:
        src = (layout.inbox if settings.output.keep_inputs else layout.processed) / e.name
        labels = layout.outbox / e.labels
        kind = input_kind(e.name)
        try:
            if kind is None or not labels.exists() or src.stat().st_size != e.size:
                continue
            with open_input(src) as f:
                frame = read_input(f, kind, settings)
            seg = _read_labels(labels)
        except (OSError, InputRejected):
            continue
        if len(seg) != frame.n_rows:
            continue
        xs.append(frame.features[frame.valid])
        segs.append(seg[frame.valid])
    if not xs:
        return np.empty((0, len(settings.features))), np.empty(0, dtype=np.int64)
    X, s = np.concatenate(xs), np.concatenate(segs)
    if len(X) > max_rows:
        keep = np.sort(np.random.default_rng(settings.seed).choice(len(X), max_rows,
                                                                   replace=False))
        X, s = X[keep], s[keep]
    return X, s


def _baseline_bands(extra: Mapping[str, Any], history: Sequence[Mapping],
                     transforms=None) -> dict:
    """Segment id -> (means, sds): the stored baseline if there is one, else
    each segment's first recorded state (the history is in the data's units already;
    the snapshot is in the model's, mapped back with ``transforms``)."""
    ref = None
    if isinstance(extra, Mapping):  # the drift watch keeps it in extra["drift"]
        drift = extra.get("drift")
        ref = extra.get("baseline") or (drift.get("baseline") if isinstance(drift, Mapping)
                                         else None)
    out: dict[int, tuple] = {}
    if isinstance(ref, Mapping) and ref.get("ids") and ref.get("means"):
        covs = ref.get("covariances") or []
        for i, sid in enumerate(ref["ids"]):
            mean = np.asarray(ref["means"][i], float)
            sd = (np.sqrt(np.diag(np.asarray(covs[i], float))) if i < len(covs)
                  else np.zeros_like(mean))
            out[int(sid)] = (mean, sd)
        return _bands_in_data_units(out, transforms)
    for h in history:
        out.setdefault(int(h["segment"]), (np.asarray(h["mean"]), np.asarray(h["spread"])))
    return out


def _bands_in_data_units(bands: dict, transforms) -> dict:
    """Baseline bands of transformed features as (centre, half-width) of their central
    68% interval in the data's units, so that ``centre -+ half-width`` is that interval."""
    if transforms is None or transforms.identity:
        return bands
    out = {}
    for sid, (mean, sd) in bands.items():
        _, low, high = centres(transforms, np.asarray(mean)[None], np.asarray(sd)[None])
        keep = np.array([k == "none" for k in transforms.kinds])
        mid, half = (low[0] + high[0]) / 2, (high[0] - low[0]) / 2
        out[sid] = (np.where(keep, mean, mid), np.where(keep, sd, half))
    return out


def _fit_points(reader: StateReader, axis: Axis) -> list[tuple[int, float]]:
    """(model version, fit_drop) of each input with a known baseline in force: the
    baseline's mean log-density per row (kept checkpoints record each baseline and the
    version it was taken at) minus the input's mean, from its labels file."""
    taken: dict[int, float] = {}
    for extra in checkpoint_extras(reader):
        drift = extra.get("drift") or {}
        ref, info = drift.get("baseline"), drift.get("baseline_info")
        if isinstance(ref, Mapping) and isinstance(info, Mapping) and \
                isinstance(ref.get("log_density"), (int, float)) and \
                info.get("model_version") is not None:
            taken[int(info["model_version"])] = float(ref["log_density"])
    if not taken:
        return []
    applied = sorted(int(r["model_version"]) for r in reader.rebaselines()
                     if r.get("applied") is not None and r.get("model_version") is not None)
    starts = sorted(taken)
    out = []
    for v, ld in sorted(axis.fit.items()):
        at = [m for m in starts if m <= v]
        if not at:
            continue
        m = at[-1]
        if any(m < r < v and r not in taken for r in applied):
            continue          # a baseline taken in between that no kept checkpoint records
        out.append((v, taken[m] - ld))
    return out


def report_data(reader: StateReader, settings: Settings, layout: Layout, *,
                since: str | None = None, until: str | None = None,
                now: float | None = None) -> dict[str, Any]:
    """Everything the report draws, read from the state.

    ``since``/``until`` are in the units of the x axis (:func:`timeline.parse_bound`):
    data time when ``drift.time_column`` is set, else stream rows.
    """
    now = time.time() if now is None else now
    configured = settings   # the stored model's names win for what is drawn
    settings, _ = settings_of_model(reader, settings)
    pruned = compacted_totals(reader.db).get("committed", {}).get("rows", 0)
    axis = build_axis(reader.ledger("committed"), layout.outbox, settings.drift.time_column,
                      rows_before=pruned, time_unit=settings.drift.time_unit,
                      time_format=settings.drift.time_format)
    lo = parse_bound(since, axis, "--since")
    hi = parse_bound(until, axis, "--until")
    if lo is not None and hi is not None and hi < lo:
        raise UsageError(f"--until ({until}) is before --since ({since})")
    shown = {v for v, x in axis.x.items()
             if (lo is None or x >= lo) and (hi is None or x <= hi)}
    all_history = reader.history()
    history = [h for h in all_history if h["version"] in shown]
    spans = [axis.span[v] for v in shown if v in axis.span]
    view = None
    if spans:   # the shown inputs' data, cut to the range asked for
        view = (max(min(a for a, _ in spans), -math.inf if lo is None else lo),
                min(max(b for _, b in spans), math.inf if hi is None else hi))
    events = [e for e in axis_events(axis, all_history, reader.rebaselines())
              if e["version"] in shown]
    cp = reader.latest_checkpoint()
    means, covs = {}, {}
    if cp is not None:
        m = Mixture.from_state(cp.arrays, cp.meta)
        for k, sid in enumerate(m.ids.tolist()):
            means[int(sid)] = m.data_means()[k]
            covs[int(sid)] = m.data_covariance_matrices()[k]
    X, seg = recent_rows(reader, settings, layout,
                         versions=shown if (lo is not None or hi is not None) else None)
    if cp is not None:   # the PCA view shares the model's (transformed) units
        transforms = from_meta(cp.meta, len(settings.features))
        if not transforms.identity and len(X):
            Y, inside = transforms.forward(X)
            X, seg = Y[inside], seg[inside]
    alerts = read_alerts(reader)
    if lo is not None or hi is not None:
        alerts = [a for a in alerts if _alert_version(a) in shown]
    return {
        "snapshot": state_snapshot(reader, configured, layout, now=now, recent_alerts=50),
        "history": history,
        "baseline": _baseline_bands(
            cp.extra if cp else {}, all_history,
            from_meta(cp.meta, len(settings.features)) if cp else None),
        "alerts": alerts,
        "means": means,
        "covariances": covs,
        "sample": (X, seg),
        "units": feature_units(settings),
        # a transformed feature is drawn by its median (band: central 68% interval)
        "centres": {f: "median" for f, k in zip(settings.features, settings.transform_kinds)
                    if k != "none"},
        "bounds": drift_bounds(settings),
        "features": list(settings.features),
        "names": segment_names(reader.db),
        "axis": axis,
        "view": view,
        "events": events,
        "fit": [(v, y) for v, y in _fit_points(reader, axis) if v in shown],
        "since": lo,
        "until": hi,
        "shown_inputs": len(shown),
        "now": now,
    }


def _alert_version(alert: Mapping[str, Any]) -> int | None:
    mv = alert.get("model_version")
    v = mv.get("last") if isinstance(mv, Mapping) else alert.get("version")
    return None if v is None else int(v)
