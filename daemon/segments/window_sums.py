"""A drift window's bookkeeping: its JSON-able record and the per-segment sums in it.

A window is a plain dict committed in the checkpoint's ``extra["drift"]`` (rows,
log-density sums, unusual rows, inputs, model versions, time range, and per segment id
the additive sums ``T``, ``Q``, ``B``, ``M``, ``S`` and, with missing features, ``miss``,
``miss2``, ``imputed``; ``B`` is what ``M`` and ``S`` divide by, and a record written
before it was kept has ``B = T``). During an input the sums of its pieces stay arrays (one row
per segment of the model) and are added into the record when it is saved; a closing
window's sums are laid out as arrays in the baseline's order of segment ids for
:func:`shoal.core.window_statistics.window_statistics`.
"""
from __future__ import annotations

import logging

import numpy as np

from shoal.core.window_statistics import (
    NEGLIGIBLE,
    WindowSums,
    add_segment_scatter,
    add_segment_variances,
    piece_sums,
)
from shoal.daemon.files.times import iso_utc
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.segments.missing_drift import GAP_KEYS, add_gap_sums, gap_piece, merge_gap_sums

__all__ = ["empty_window", "window_copy", "empty_piece_sums", "add_lists", "add_row_sums",
           "add_unusual", "add_piece_sums", "merge_window_sums", "aligned_sums",
           "baseline_missing_shares", "widen", "time_range", "time_kind", "span", "files_of",
           "log_times_left_out"]


def empty_window(index: int) -> dict:
    """The record of window ``index`` before its first row."""
    return {"index": index, "n": 0, "ld": 0.0, "ld2": 0.0, "segments": {},
            "unusual": {"n": 0, "sum": None, "by_segment": {}},
            "files": [], "versions": [None, None], "time": [None, None]}


def window_copy(win: dict | None) -> dict | None:
    """A copy of an open window's record to add pieces to: its dicts and its list of files
    copied, its lists of sums and ranges shared (pieces replace them, never change them
    in place; copying them cost an input about 2.5 ms at D=16, K=8)."""
    if win is None:
        return None
    out = dict(win, files=list(win["files"]),
               segments={sid: dict(acc) for sid, acc in win["segments"].items()})
    out["unusual"] = dict(win["unusual"], by_segment=dict(win["unusual"]["by_segment"]))
    return out


def empty_piece_sums(win: dict, ids: list, n_features: int, moments=None) -> dict:
    """An accumulator of a window's pieces' sums, arrays by segment position of ``ids``:
    zeros, or a first piece's :class:`shoal.core.piece_moments.PieceMoments` (its
    arrays taken over, not copied)."""
    K, D = len(ids), n_features
    if moments is not None:
        return {"window": win, "ids": ids, "T": moments.T, "Q": moments.Q, "B": moments.B,
                "M": moments.M, "S": moments.S}
    return {"window": win, "ids": ids, "T": np.zeros(K), "Q": np.zeros(K), "B": np.zeros(K),
            "M": np.zeros((K, D)), "S": np.zeros((K, D, D))}


def add_lists(old, new):
    """``old + new`` as JSON lists (``old`` None: ``new``)."""
    return (np.asarray(old) + new).tolist() if old is not None else np.asarray(new).tolist()


def add_row_sums(sums: dict, mixture, X: np.ndarray, Xc: np.ndarray, scores) -> None:
    """Add a piece's per-segment sums, from its rows ``X`` (centred ``Xc``; NaN where a
    value is missing, filled in place), to an accumulator of arrays by segment
    position: for rows with missing features and spherical models (the others take
    the M-step's own moments, :mod:`shoal.core.piece_moments`)."""
    resp_kn = np.ascontiguousarray(scores.resp.T)   # (K, n): the core's own layout
    gaps = gap_piece(mixture, X, Xc, resp_kn)
    T, Q, M = piece_sums(resp_kn, Xc)
    sums["T"] += T
    sums["B"] += T     # unweighted rows: one per unit of responsibility
    sums["Q"] += Q
    sums["M"] += M
    weights = resp_kn if gaps is None else gaps.resp
    if mixture.covariance == "full":
        add_segment_scatter(sums["S"], Xc, weights, NEGLIGIBLE)
    else:   # diag and spherical compare variances only
        add_segment_variances(sums["S"], Xc, weights)
    if gaps is not None:
        add_gap_sums(sums, gaps)


def add_unusual(unusual: dict, keys: list[str], tallies) -> None:
    """Count a piece's unusual rows into a window's ``unusual`` record: how many, the sum
    of their rows centred on the model's centre, and how many per segment (``keys``:
    the model's segment ids as strings, in component order), from the piece's
    :class:`~shoal.core.piece_tallies.PieceTallies`."""
    unusual["n"] += tallies.unusual
    unusual["sum"] = add_lists(unusual["sum"], tallies.unusual_sum)
    by_segment = unusual["by_segment"]
    for key, n in zip(keys, tallies.unusual_by.tolist()):
        if n:
            by_segment[key] = by_segment.get(key, 0) + n


def add_piece_sums(segments: dict, sums: dict) -> None:
    """Add a piece accumulator's per-segment sums (arrays by segment position, ids in
    ``sums["ids"]``) into a window record's ``segments`` (by segment id)."""
    for k, sid in enumerate(sums["ids"]):
        if sums["T"][k] <= 0.0:
            continue
        acc = segments.setdefault(str(sid), {"T": 0.0, "Q": 0.0, "B": 0.0, "M": None,
                                             "S": None})
        acc["B"] = acc.get("B", acc["T"]) + float(sums["B"][k])
        acc["T"] += float(sums["T"][k])
        acc["Q"] += float(sums["Q"][k])
        acc["M"] = add_lists(acc["M"], sums["M"][k])
        acc["S"] = add_lists(acc["S"], sums["S"][k])
        merge_gap_sums(acc, sums, k, add_lists)


def merge_window_sums(into: dict | None, win: dict) -> dict:
    """Add a closed window's rows and sums to a re-baseline's (``None``: start)."""
    if into is None:
        into = {"n": 0, "ld": 0.0, "segments": {}, "center": win["center"]}
    into["n"] += win["n"]
    into["ld"] += win["ld"]
    for sid, acc in win["segments"].items():
        old = into["segments"].setdefault(sid, {"T": 0.0, "Q": 0.0, "B": 0.0, "M": None,
                                                "S": None})
        old["B"] = old.get("B", old["T"]) + acc.get("B", acc["T"])
        old["T"] += acc["T"]
        old["Q"] += acc["Q"]
        old["M"] = add_lists(old["M"], acc["M"])
        old["S"] = add_lists(old["S"], acc["S"])
        for key in GAP_KEYS:
            if acc.get(key) is not None:
                old[key] = add_lists(old.get(key), acc[key])
    return into


def aligned_sums(segments: dict, pending: dict | None, ids, n_features: int) -> WindowSums:
    """A window's sums as arrays, one row per segment of ``ids`` (zeros for a segment
    without rows): the record's ``segments`` plus a piece accumulator's ``pending``
    sums, added as :func:`add_piece_sums` would add them (the arrays of ``pending``
    themselves when the record has none and their ids are ``ids``)."""
    if not segments and pending is not None and pending["ids"] == list(ids):
        # a window within one input, on the model it closed with (the usual case)
        return WindowSums(T=pending["T"], Q=pending["Q"], M=pending["M"], S=pending["S"],
                          miss=pending.get("miss"), miss2=pending.get("miss2"),
                          imputed=pending.get("imputed"), B=pending["B"])
    K, d = len(ids), n_features
    at = {int(sid): k for k, sid in enumerate(ids)}
    T, Q, B = np.zeros(K), np.zeros(K), np.zeros(K)
    M, S = np.zeros((K, d)), np.zeros((K, d, d))
    gaps: dict[str, np.ndarray] = {}

    def gap(key):
        if key not in gaps:
            gaps[key] = np.zeros((K, d))
        return gaps[key]

    for sid, acc in segments.items():
        k = at.get(int(sid))
        if k is None:
            continue
        T[k], Q[k], B[k] = acc["T"], acc["Q"], acc.get("B", acc["T"])
        M[k], S[k] = acc["M"], acc["S"]
        for key in GAP_KEYS:
            if acc.get(key) is not None:
                gap(key)[k] = acc[key]
    if pending is not None:
        pairs = [(at[sid], j) for j, sid in enumerate(pending["ids"])
                 if sid in at and pending["T"][j] > 0.0]
        if pairs:
            rows, cols = (np.array(v, dtype=np.intp) for v in zip(*pairs))
            T[rows] += pending["T"][cols]
            Q[rows] += pending["Q"][cols]
            B[rows] += pending["B"][cols]
            M[rows] += pending["M"][cols]
            S[rows] += pending["S"][cols]
            for key in GAP_KEYS:
                if key in pending:
                    gap(key)[rows] += pending[key][cols]
    return WindowSums(T=T, Q=Q, M=M, S=S, miss=gaps.get("miss"), miss2=gaps.get("miss2"),
                      imputed=gaps.get("imputed"), B=B)


def baseline_missing_shares(shares: dict | None, ids, n_features: int) -> np.ndarray:
    """The baseline's share of each segment's rows that missed each feature, shape
    ``(len(ids), n_features)`` (zeros where it has none)."""
    out = np.zeros((len(ids), n_features))
    for k, sid in enumerate(ids):
        row = (shares or {}).get(str(sid))
        if row is not None:
            out[k] = row
    return out


def widen(pair, lo, hi):
    """The range ``pair`` (ends may be None) widened to take in ``lo..hi``."""
    a, b = pair
    return [lo if a is None or lo < a else a, hi if b is None or hi > b else b]


def time_range(times):
    """(first, last) of a piece's times as JSON-able values, or None."""
    if times is None or len(times) == 0:
        return None
    t = np.asarray(times)
    if t.dtype == object or t.dtype.kind == "U":
        # text (CSV): numbers if they all parse as numbers (as the same column read from
        # Parquet gives), else ISO times if they parse
        values = [str(v) for v in t.tolist() if v is not None]
        try:
            t = np.array([float(v) for v in values])
        except ValueError:
            try:
                t = np.array([v.rstrip("Z") for v in values], dtype="datetime64[ms]")
            except ValueError:
                pass
    if np.issubdtype(t.dtype, np.datetime64):
        t = t[~np.isnat(t)]
        if not t.size:
            return None
        return iso_utc(t.min()), iso_utc(t.max())
    if np.issubdtype(t.dtype, np.number):
        t = t[np.isfinite(t.astype(np.float64))]
        return (float(t.min()), float(t.max())) if t.size else None
    values = [str(v) for v in t.tolist() if v is not None]
    return (min(values), max(values)) if values else None


def files_of(windows) -> list[str]:
    """The inputs of ``windows``, each once, in order."""
    out: list[str] = []
    for w in windows:
        for f in w["files"]:
            if f not in out:
                out.append(f)
    return out


def log_times_left_out(file: str, column: str | None, unreadable: int, dropped: int) -> None:
    """Say once per input how many of its rows' times were left out of their windows (if
    any): ``unreadable`` could not be read, ``dropped`` were of another kind than their
    window's (numbers after times or text, or the other way)."""
    if unreadable:
        log_event("time_unreadable", logging.WARNING, file=file, rows=unreadable,
                  column=column,
                  detail="these rows' times could not be read (see drift.time_unit "
                         "and drift.time_format); they have no time in their windows")
    if dropped:
        log_event("time_column_kind_changed", logging.WARNING, file=file, rows=dropped,
                  detail="drift.time_column changed kind (numbers / times or text) "
                         "between inputs; these rows' times are left out of their "
                         "windows' time ranges (counted as times_dropped)")


def time_kind(value) -> str:
    """Times in a window's range are numbers or text (ISO times); never both."""
    return "number" if isinstance(value, (int, float)) and not isinstance(value, bool) \
        else "text"


def span(pairs):
    """``{"first", "last"}`` over time ranges (None: no times), of the latest kind."""
    pairs = [p for p in pairs if p]
    if not pairs:
        return None
    kind = time_kind(pairs[-1][0])   # the latest kind, if the column changed kind
    pairs = [p for p in pairs if time_kind(p[0]) == kind]
    return {"first": min(p[0] for p in pairs), "last": max(p[1] for p in pairs)}
