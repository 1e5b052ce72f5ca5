"""Bounds: statistics, noise levels and bounds in, raised and cleared events out.

:func:`evaluate_bounds` turns statistics, noise levels and bounds into
raised and cleared events with persistence and hysteresis, keeping its state as a
plain JSON-able dict.
"""
from __future__ import annotations

import math

import numpy as np

from .errors import ModelError

__all__ = ["evaluate_bounds"]

STATE_FORMAT = 1

# ------------------------------------------------------------------------------- bounds


def _segment_order(segment):
    return (0, int(segment), "") if isinstance(segment, (int, np.integer)) else (1, 0, str(segment))


def _fresh_entry():
    return {"status": "ok", "above": 0, "below": 0, "first_at": None, "raised_at": None,
            "peak": None}


def _moving(values, noise, bounds, entries, noise_multiple):
    """``(segment, statistic, value, bound, noise)`` of the pairs whose state may change:
    those with a finite value and a bound that cross it or are raised or part-way to
    being raised. A quiet pair with no entry would get a fresh one and drop it again, so
    on a stream without drift (nearly every pair, nearly every window) the state machine
    runs on none."""
    out = []
    for key, value in values.items():
        segment, statistic = key
        bound = bounds[key] if key in bounds else bounds.get(statistic)
        value = float(value)
        if bound is None or not math.isfinite(value):
            continue
        bound = float(bound)
        level = float(noise.get(key, 0.0))
        if (value > bound and value > noise_multiple * level) or \
                str(statistic) in entries.get(str(segment), ()):
            out.append((segment, statistic, value, bound, level))
    return out


def evaluate_bounds(values, noise, bounds, state=None, *, noise_multiple=3.0, persist=3,
                    resolve_fraction=0.8, resolve_persist=3, at=None):
    """Decide which (segment, statistic) pairs are raised or cleared.

    A value *crosses* when it exceeds its bound and also ``noise_multiple`` times its
    noise level. A pair is raised after ``persist`` consecutive crossings; a raised pair
    clears after ``resolve_persist`` consecutive values below
    ``bound * resolve_fraction``. A pair with no value this time, a non-finite value,
    or no bound keeps its state unchanged (no evidence either way).

    Parameters
    ----------
    values : mapping of (segment, statistic) to float
        Statistics, as from ``bound_inputs()``; larger means more drift.
    noise : mapping of (segment, statistic) to float
        Their noise levels (missing: 0; ``nan`` never crosses).
    bounds : mapping of statistic or (segment, statistic) to float
        A ``(segment, statistic)`` key overrides the statistic's bound for that segment.
    state : dict or None
        What the previous call returned (``None`` to start).
    noise_multiple : float, default 3.0
    persist, resolve_persist : int, default 3
    resolve_fraction : float in (0, 1], default 0.8
    at : JSON-able, optional
        A label for this evaluation (for example the model version), recorded in the
        state and the events.

    Returns
    -------
    state : dict
        The new state, JSON-able; the input is not modified. Only pairs that are
        raised or part-way to being raised are kept.
    events : list of dict
        ``{"segment", "statistic", "status" ("raised" or "cleared"), "value",
        "bound", "noise", "first_at", "raised_at", "at", "peak"}``, ordered by segment
        (integer ids first) then statistic.
    """
    if not (isinstance(persist, (int, np.integer)) and persist >= 1):
        raise ModelError(f"persist should be a positive integer, got {persist!r}")
    if not (isinstance(resolve_persist, (int, np.integer)) and resolve_persist >= 1):
        raise ModelError(f"resolve_persist should be a positive integer, got {resolve_persist!r}")
    if not 0.0 < float(resolve_fraction) <= 1.0:
        raise ModelError(f"resolve_fraction should lie in (0, 1], got {resolve_fraction!r}")
    if not float(noise_multiple) >= 0.0:
        raise ModelError(f"noise_multiple should be >= 0, got {noise_multiple!r}")
    state = {"format": STATE_FORMAT, "entries": {}} if state is None else state
    if state.get("format") != STATE_FORMAT or not isinstance(state.get("entries"), dict):
        raise ModelError(f"bounds state should have format {STATE_FORMAT} and entries")
    entries = {seg: {stat: dict(entry) for stat, entry in stats.items()}
               for seg, stats in state["entries"].items()}
    events = []
    for segment, statistic, value, bound, level in sorted(
            _moving(values, noise, bounds, entries, noise_multiple),
            key=lambda k: (_segment_order(k[0]), str(k[1]))):
        seg_key, stat_key = str(segment), str(statistic)
        entry = entries.get(seg_key, {}).get(stat_key) or _fresh_entry()
        event = None
        if entry["status"] != "raised":
            if value > bound and value > noise_multiple * level:
                entry["above"] += 1
                if entry["above"] == 1:
                    entry["first_at"] = at
                entry["peak"] = max(value, entry["peak"] or value)
                if entry["above"] >= persist:
                    entry.update(status="raised", raised_at=at, below=0)
                    event = "raised"
            else:
                entry = _fresh_entry()
        else:
            entry["peak"] = max(value, entry["peak"])
            if value < bound * resolve_fraction:
                entry["below"] += 1
                if entry["below"] >= resolve_persist:
                    event = "cleared"
            else:
                entry["below"] = 0
        if event is not None:
            events.append({
                "segment": segment, "statistic": statistic, "status": event,
                "value": value, "bound": bound, "noise": level,
                "first_at": entry["first_at"], "raised_at": entry["raised_at"], "at": at,
                "peak": entry["peak"],
            })
        if event == "cleared":
            entry = _fresh_entry()
        if entry["status"] == "raised" or entry["above"] > 0:
            entries.setdefault(seg_key, {})[stat_key] = entry
        elif stat_key in entries.get(seg_key, {}):
            del entries[seg_key][stat_key]
            if not entries[seg_key]:
                del entries[seg_key]
    return {"format": STATE_FORMAT, "entries": entries}, events

