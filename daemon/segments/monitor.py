"""Drift of each segment against its baseline, window by window, and the alerts it raises.

The pipeline hands every piece of rows it learns to an :class:`InputWatch` (one per
input). Rows are gathered into evaluation windows of ``drift.window_rows`` rows,
counted along the stream from the first row learned after warm-up, so the windows do
not depend on how the stream is cut into files. A window keeps additive sums only
(responsibility totals, their squares, first and second moments per segment, the
log-density sums and the unusual rows), so a window may span inputs; the sums travel
in the checkpoint's ``extra["drift"]`` and are committed with the model.

When ``drift.settle_rows`` rows have been learned after warm-up (rounded up to a
whole window) the model is taken as the baseline (:class:`shoal.core.drift.Baseline`)
together with the mean log-density of the last window. After that each window is
compared with it, per segment:

``mean_shift``     the window's responsibility-weighted mean, in baseline sds
                   (Mahalanobis distance under the baseline covariance);
``spread_ratio``   ``exp(|log|S_window| - log|S_ref|| / (2 D))``, the geometric mean of
                   the sd ratios either way (evaluated on its log);
``weight_change``  ``|share of the window's rows - baseline weight|``;
``feature_shift[f]`` one feature's window mean in baseline sds (only when bounded);
``fit_drop``       (whole model) baseline mean log-density per row minus the window's.

A segment whose share of the window is under a quarter of its baseline weight is
not measured for the shape statistics (mean, spread, feature): the rows it still takes
are mostly its neighbours' tails, and ``weight_change`` tells the story.

Each comes with its estimation noise at Kish's effective rows of the window and of
the baseline (:mod:`shoal.core.drift`). :func:`shoal.core.drift.evaluate_bounds`
turns them into raised and cleared events (bound and noise, persistence,
hysteresis); here they become alert payloads with deterministic ids and an
explanation in the data's own units.
"""
from __future__ import annotations

import hashlib
import json
import logging
import math
from typing import Any

import numpy as np

from shoal.config import Settings
from shoal.core import Mixture
from shoal.core.distances import GaussianSet, hotelling_t2_pvalue
from shoal.core.drift import (
    WHOLE_MODEL,
    Baseline,
    add_segment_scatter,
    evaluate_bounds,
    explain,
    mean_shift_noise,
    spread_noise,
    weight_noise,
)
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.files.times import iso_utc
from shoal.daemon.model.transforming import moves_in_data_units
from shoal.daemon.segments.missing_drift import (
    add_gap_sums,
    gap_piece,
    merge_gap_sums,
    missing_note,
    missing_share_statistics,
    observed_feature_means,
    window_shares,
)

__all__ = ["DriftMonitor", "InputWatch", "alert_id", "STATISTIC_UNITS", "SEGMENT_STATISTICS",
           "PAYLOAD_SCHEMA_VERSION"]

STATE_FORMAT = 1
# Version of the alert payload's fields (README, "Alert payload"); a change to a field's
# name or meaning bumps it, so a receiver can tell which fields to expect.
PAYLOAD_SCHEMA_VERSION = 1
SEGMENT_STATISTICS = ("mean_shift", "spread_ratio", "weight_change", "missing_share")
STATISTIC_UNITS = {
    "missing_share": "share of rows",
    "mean_shift": "baseline sds",
    "spread_ratio": "ratio of sds",
    "weight_change": "share of rows",
    "fit_drop": "nats per row",
    "feature_shift": "baseline sds",
}
_TOP_FEATURES = 3
_SHAPE_MIN_SHARE = 0.25
"""A segment whose share of a window's rows is under this fraction of its baseline
weight is not measured for mean, spread or feature shifts in that window (it counts
as not crossing): the few rows it still takes are mostly its neighbours' tails. Its
``weight_change`` says what happened."""


def alert_id(baseline_number: int, segment, statistic: str, first_window: int) -> str:
    """The same cause (baseline, segment, statistic, first crossing window) -> the same id."""
    cause = json.dumps([int(baseline_number), str(segment), statistic, int(first_window)])
    return "drift-" + hashlib.sha256(cause.encode()).hexdigest()[:20]


def _feature_stat(name: str) -> str:
    return f"feature_shift[{name}]"


def _num(x) -> float | None:
    x = float(x)
    return x if math.isfinite(x) else None


def _fmt(x: float) -> str:
    return f"{x:.4g}"


# ------------------------------------------------------------------------- window sums


_NEGLIGIBLE = 1e-12   # responsibilities below this are left out of a window's second moments


def _positive_definite(mats: np.ndarray) -> np.ndarray:
    """Which of a stack of symmetric matrices are positive definite: one batched Cholesky
    when all are (the usual case), eigenvalues only when one is not."""
    try:
        np.linalg.cholesky(mats)
        return np.ones(mats.shape[0], dtype=bool)
    except np.linalg.LinAlgError:
        return np.all(np.linalg.eigvalsh(mats) > 0, axis=1)


def _empty_window(index: int) -> dict:
    return {"index": index, "n": 0, "ld": 0.0, "ld2": 0.0, "segments": {},
            "unusual": {"n": 0, "sum": None, "by_segment": {}},
            "files": [], "versions": [None, None], "time": [None, None]}


def _add(old, new):
    return (np.asarray(old) + new).tolist() if old is not None else np.asarray(new).tolist()


def _add_arrays(old, new):
    return np.asarray(old) + new if old is not None else new


def _add_sums(segments: dict, sums: dict, add) -> None:
    """Add a piece accumulator's per-segment sums (arrays by segment position) into
    ``segments`` (by segment id), combining matrices with ``add``."""
    for k, sid in enumerate(sums["ids"]):
        if sums["T"][k] <= 0.0:
            continue
        acc = segments.setdefault(str(sid), {"T": 0.0, "Q": 0.0, "M": None, "S": None})
        acc["T"] += float(sums["T"][k])
        acc["Q"] += float(sums["Q"][k])
        acc["M"] = add(acc["M"], sums["M"][k])
        acc["S"] = add(acc["S"], sums["S"][k])
        merge_gap_sums(acc, sums, k, add)


def _widen(pair, lo, hi):
    a, b = pair
    return [lo if a is None or lo < a else a, hi if b is None or hi > b else b]


def _time_range(times):
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


# ----------------------------------------------------------------------------- monitor


class DriftMonitor:
    """Settings-bound factory of :class:`InputWatch` objects, and re-baselining."""

    def __init__(self, settings: Settings):
        self.settings = settings
        self.drift = settings.drift
        self.features = list(settings.features)

    def begin(self, state: dict | None, *, version: int, file: str, times=None,
              unusual_below: float | None = None) -> "InputWatch | None":
        if not self.drift.enabled:
            return None
        return InputWatch(self, state, version=version, file=file, times=times,
                          unusual_below=unusual_below)

    # bounds from settings: statistic -> bound, (segment, statistic) -> bound (log scale for
    # spread_ratio)
    def bounds(self, segment_ids) -> dict:
        b = self.drift.bounds
        out: dict[Any, float] = {}

        def put(key, stat, value):
            if value is None:
                return
            out[key] = math.log(value) if stat == "spread_ratio" else float(value)

        for stat in SEGMENT_STATISTICS + ("fit_drop",):
            put(stat, stat, getattr(b, stat))
        for f in self.features:
            put(_feature_stat(f), "feature_shift", b.feature_shift)
        for o in self.drift.overrides:       # feature-wide first, then segment-specific
            if o.segment is None and o.feature is not None:
                put(_feature_stat(o.feature), "feature_shift", o.feature_shift)
        for o in self.drift.overrides:
            if o.segment is None or o.segment not in segment_ids:
                continue
            for stat in SEGMENT_STATISTICS:
                put((o.segment, stat), stat, getattr(o, stat))
            feats = [o.feature] if o.feature is not None else self.features
            for f in feats:
                put((o.segment, _feature_stat(f)), "feature_shift", o.feature_shift)
        return out

    def wants_feature_shift(self) -> bool:
        return self.drift.bounds.feature_shift is not None or any(
            o.feature_shift is not None for o in self.drift.overrides)


class InputWatch:
    """Drift evaluation for the rows of one input; ``state`` and ``alerts`` go to the commit."""

    # the model's FeatureTransforms (set by the pipeline): explanations give a
    # transformed feature's medians in the data's units
    transforms = None

    def __init__(self, monitor: DriftMonitor, state: dict | None, *, version: int, file: str,
                 times=None, unusual_below=None):
        self.monitor = monitor
        self.drift = monitor.drift
        self.version = version
        self.file = file
        self.times = times
        self.unusual_below = unusual_below
        self.alerts: list[tuple[str, dict]] = []
        self.rebaselined = False
        self._times_dropped = 0   # rows whose times did not fit their window's kind
        self.times_unreadable = 0   # time values present that could not be read
        if state is not None and state.get("format") != STATE_FORMAT:
            raise ValueError(f"drift state has format {state.get('format')!r}")
        self._state = json.loads(json.dumps(state)) if state is not None else None
        self.last_values: dict[str, dict[str, float]] = {}
        self._ref_cache = None   # (baseline dict, Baseline, GaussianSet)
        # the open window's per-segment sums of the pieces since the last flush, as arrays
        # (adding each piece to the state's JSON lists cost more than computing it)
        self._pending: dict | None = None
        self._rows_buffer: np.ndarray | None = None   # a piece's centred rows

    @property
    def state(self) -> dict | None:
        """The drift state (JSON-able, committed with the model), window sums up to date."""
        self._flush()
        return self._state

    @state.setter
    def state(self, value: dict | None) -> None:
        self._flush()
        self._state = value

    # -- setup -----------------------------------------------------------------------
    def start(self, stream_offset: int) -> None:
        """A new model: windows count from its first learned row (stream row ``stream_offset``)."""
        self.state = {"format": STATE_FORMAT, "offset": int(stream_offset),
                      "window_rows": int(self.drift.window_rows), "baseline": None,
                      "baseline_number": 0, "baseline_info": None, "window": None,
                      "bounds": None, "cool": {}, "recent": [], "open": {},
                      "last_ld": None, "rebase": None}

    def _ensure(self) -> dict:
        if self._state is None:  # a model made before drift watching: count from here
            self.start(self.monitor.settings.warmup_rows)
        return self._state

    # -- pieces ----------------------------------------------------------------------
    @property
    def window_rows(self) -> int:
        """Fixed for a model once its watching started (a reload does not move windows)."""
        st = self._ensure()
        return int(st.get("window_rows") or self.drift.window_rows)

    def rows_to_boundary(self, n_rows: int) -> int:
        """Rows the next piece may hold so that it does not cross a window boundary."""
        w = self.window_rows
        return w - n_rows % w

    def observe(self, mixture: Mixture, X: np.ndarray, scores, start: int) -> None:
        """Add a learned piece (rows ``start..`` of the input's learned rows); ``mixture`` is
        the model after learning it."""
        st = self._ensure()
        w = self.window_rows
        end_row = int(mixture.n_rows)
        first_row = end_row - len(X)
        index = first_row // w
        win = st["window"]
        if win is None or win["index"] != index:
            self._flush()
            win = st["window"] = _empty_window(index)
        times = None if self.times is None else self.times[start:start + len(X)]
        self._accumulate(win, mixture, X, scores, times)
        if end_row % w == 0:
            self._close(win, mixture, first_window_row=index * w)
            st["window"] = None

    def _accumulate(self, win, mixture, X, scores, times):
        n = len(X)
        if n == 0:
            return
        resp_kn = np.ascontiguousarray(scores.resp.T)   # (K, n): the core's own layout
        if self._rows_buffer is None or len(self._rows_buffer) < n:
            self._rows_buffer = np.empty((n, X.shape[1]))
        Xc = np.subtract(X, mixture.center, out=self._rows_buffer[:n])
        gaps = gap_piece(mixture, X, Xc, resp_kn)    # rows with missing features, or None
        ld = scores.log_density
        win["n"] += n
        win["ld"] += float(ld.sum())
        win["ld2"] += float(np.dot(ld, ld))
        ids = mixture.ids.tolist()
        sums = self._pending
        if sums is None or sums["window"] is not win or sums["ids"] != ids:
            self._flush()
            K, D = resp_kn.shape[0], X.shape[1]
            sums = self._pending = {"window": win, "ids": ids, "T": np.zeros(K),
                                    "Q": np.zeros(K), "M": np.zeros((K, D)),
                                    "S": np.zeros((K, D, D))}
        sums["T"] += resp_kn.sum(axis=1)
        sums["Q"] += np.einsum("kn,kn->k", resp_kn, resp_kn)
        sums["M"] += resp_kn @ Xc
        # Second moments from the rows that carry weight for each segment: rows under
        # _NEGLIGIBLE add less than that share of a row each, far below the statistics'
        # noise, and on separated segments most rows are skipped.
        add_segment_scatter(sums["S"], Xc, resp_kn if gaps is None else gaps.resp, _NEGLIGIBLE)
        if gaps is not None:
            add_gap_sums(sums, gaps)
        limit = self._state.get("baseline_info", {}) or {}
        below = limit.get("unusual_below")
        if below is not None:
            mask = ld < below
            if mask.any():
                u = win["unusual"]
                u["n"] += int(mask.sum())
                u["sum"] = _add(u["sum"], Xc[mask].sum(axis=0))
                segs, counts = np.unique(scores.segment[mask], return_counts=True)
                for sid, c in zip(segs.tolist(), counts.tolist()):
                    u["by_segment"][str(sid)] = u["by_segment"].get(str(sid), 0) + int(c)
        if self.file not in win["files"]:
            win["files"].append(self.file)
        win["versions"] = _widen(win["versions"], self.version, self.version)
        span = _time_range(times)
        if span is not None:
            if win["time"][0] is None or _time_kind(win["time"][0]) == _time_kind(span[0]):
                win["time"] = _widen(win["time"], *span)
            else:   # numbers after times or text, or the other way: not comparable
                win["times_dropped"] = win.get("times_dropped", 0) + len(X)
                self._times_dropped += len(X)
        win["center"] = mixture.center.tolist()

    def _log_times_dropped(self) -> None:
        """Say once per input how many of its rows' times were left out (if any)."""
        if self.times_unreadable:
            log_event("time_unreadable", logging.WARNING, file=self.file,
                      rows=self.times_unreadable, column=self.drift.time_column,
                      detail="these rows' times could not be read (see drift.time_unit "
                             "and drift.time_format); they have no time in their windows")
        if self._times_dropped:
            log_event("time_column_kind_changed", logging.WARNING, file=self.file,
                      rows=self._times_dropped,
                      detail="drift.time_column changed kind (numbers / times or text) "
                             "between inputs; these rows' times are left out of their "
                             "windows' time ranges (counted as times_dropped)")

    def _flush(self) -> None:
        """Add the pending per-segment sums to their window's JSON-able sums."""
        sums, self._pending = self._pending, None
        if sums is not None:
            _add_sums(sums["window"]["segments"], sums, _add)

    def _window_segments(self, win) -> dict:
        """A closing window's per-segment sums: those of earlier inputs (JSON lists) and
        the pending ones of this input added, as arrays, without putting them into the
        state (a closed window is not kept): values as after :meth:`_flush`."""
        if self._pending is not None and self._pending["window"] is not win:
            self._flush()
        sums, self._pending = self._pending, None
        segments = {sid: dict(acc) for sid, acc in win["segments"].items()}
        if sums is not None:
            _add_sums(segments, sums, _add_arrays)
        return segments

    # -- windows ---------------------------------------------------------------------
    def _window_info(self, win, first_window_row) -> dict:
        off = self.state["offset"]
        return {"index": win["index"],
                "rows": [off + first_window_row, off + first_window_row + win["n"] - 1],
                "versions": win["versions"], "files": win["files"],
                "time": win["time"] if win["time"][0] is not None else None}

    def _close(self, win, mixture: Mixture, first_window_row: int) -> None:
        st = self._state
        if st.get("rebase") is not None or st["baseline"] is None:
            self._flush()    # sums kept for the re-baseline (or not needed)
            segments = None
        else:
            segments = self._window_segments(win)
        info = self._window_info(win, first_window_row)
        keep = max(self.drift.persist, self.drift.resolve_persist)
        st["recent"] = (st["recent"] + [info])[-keep:]
        st["last_ld"] = win["ld"] / win["n"] if win["n"] else None
        if st.get("rebase") is not None:
            self._collect(win, mixture, info)
            return
        if st["baseline"] is None:
            if first_window_row + win["n"] >= self.drift.settle_rows:
                self._take_baseline(mixture, st["last_ld"], info)
                st["baseline_info"]["missing_share"] = window_shares(win["segments"])
            return
        self._evaluate(win, info, segments)

    def _take_baseline(self, mixture: Mixture, log_density, info, ref=None) -> None:
        st = self.state
        if ref is None:
            ref = Baseline.from_mixture(mixture, log_density=log_density)
        st["baseline"] = ref.to_dict()
        st["baseline_info"] = {"number": st["baseline_number"], "model_version": self.version,
                                "row": info["rows"][1] + 1, "unusual_below": self.unusual_below,
                                "note": None}
        st["bounds"], st["cool"], st["open"] = None, {}, {}
        log_event("drift_baseline_taken", baseline=st["baseline_number"],
                  model_version=self.version, row=info["rows"][1] + 1,
                  segments=[int(i) for i in ref.ids])

    def rebaseline(self, mixture: Mixture, note: str) -> None:
        """Accept the present as normal: raised alerts clear now, and the next
        ``settle_rows`` rows (whole windows, at least one) become the new baseline.

        The baseline is taken from those rows themselves (responsibility-weighted
        weights, means and covariances), not from the model, which lags a population
        that has just moved by about a half-life.
        """
        st = self._ensure()
        for key, alert in sorted(st["open"].items()):
            payload = dict(alert["payload"], status="cleared", value=None,
                           cleared_by="rebaseline", note=note)
            payload["model_version"] = {"first": alert["payload"]["model_version"]["first"],
                                        "last": self.version}
            self._emit(payload)
        if st["baseline"] is not None:
            st["baseline_number"] += 1
        st["baseline"], st["bounds"], st["cool"], st["open"] = None, None, {}, {}
        st["rebase"] = {"note": note, "requested_version": self.version, "sums": None}
        self.rebaselined = True
        log_event("drift_rebaseline_started", baseline=st["baseline_number"],
                  model_version=self.version, note=note,
                  rows=max(self.drift.settle_rows, self.window_rows))

    def _collect(self, win, mixture: Mixture, info) -> None:
        """Add a window to the re-baseline sums; take the baseline once there are enough."""
        st = self.state
        rebase = st["rebase"]
        sums = rebase["sums"] = _merge_sums(rebase["sums"], win)
        if sums["n"] < max(self.drift.settle_rows, self.window_rows):
            return
        ref = _baseline_from_sums(sums, mixture)
        st["rebase"] = None
        self._take_baseline(mixture, ref.log_density, info, ref=ref)
        st["baseline_info"]["note"] = rebase["note"]
        st["baseline_info"]["missing_share"] = window_shares(sums["segments"])

    def _evaluate(self, win, info, segments: dict | None = None) -> None:
        st = self.state
        ref, factors = self._baseline()
        values, noise, detail = self._statistics(win, ref, factors, segments)
        at = win["index"]
        for key in list(st["cool"]):
            if st["cool"][key] < at:
                del st["cool"][key]
        for (seg, stat) in list(values):
            if f"{seg}|{stat}" in st["cool"]:
                values[(seg, stat)] = 0.0
        bounds = self.monitor.bounds(set(int(i) for i in ref.ids))
        d = self.drift
        st["bounds"], events = evaluate_bounds(
            values, noise, bounds, st["bounds"], noise_multiple=d.noise_multiple,
            persist=d.persist, resolve_fraction=d.resolve_fraction,
            resolve_persist=d.resolve_persist, at=at)
        self.last_values = {}
        for (seg, stat), v in values.items():
            bound = bounds.get((seg, stat), bounds.get(stat))
            self.last_values.setdefault(str(seg), {})[stat] = {
                "value": _num(_shown(stat, v)), "noise": _num(_shown_noise(stat, noise[(seg, stat)])),
                "bound": None if bound is None else _num(_shown(stat, bound))}
        for e in events:
            self._event(e, detail, ref, info)

    def _baseline(self) -> tuple[Baseline, GaussianSet]:
        """The baseline in force and its factorised Gaussians, parsed once per baseline."""
        doc = self.state["baseline"]
        if self._ref_cache is None or self._ref_cache[0] is not doc:
            ref = Baseline.from_dict(doc)
            self._ref_cache = (doc, ref, GaussianSet(ref.means, ref.covariances))
        return self._ref_cache[1], self._ref_cache[2]

    def _statistics(self, win, ref: Baseline, factors: GaussianSet,
                    segments: dict | None = None):
        """(values, noise, detail) of one window (its per-segment sums ``segments``, or
        ``win["segments"]``); the core's kernels are called once per window on all
        segments together."""
        if segments is None:
            segments = win["segments"]
        d = len(ref.means[0])
        n = win["n"]
        center = np.asarray(win["center"])
        features = self.monitor.features
        cov_type = ref.covariance
        values, noise, detail = {}, {}, {}
        w_noise = np.atleast_1d(weight_noise(ref.weights, float(n), ref.total_n_eff))
        seen, n_effs, means, covs = [], [], [], []
        for k, sid in enumerate(ref.ids.tolist()):
            acc = segments.get(str(sid))
            w_ref = float(ref.weights[k])
            share = (acc["T"] / n) if acc else 0.0
            values[(sid, "weight_change")] = abs(share - w_ref)
            noise[(sid, "weight_change")] = float(w_noise[k])
            detail[sid] = {"share": share, "baseline_weight": w_ref, "n_eff": 0.0}
            if share < _SHAPE_MIN_SHARE * w_ref:
                # a segment that lost most of its rows: what is left is mostly the
                # neighbours' tails, whose mean and spread say nothing about it
                for stat in self._shape_statistics():
                    values[(sid, stat)], noise[(sid, stat)] = 0.0, 0.0
                continue
            if not acc or acc["T"] <= 0.0 or acc["Q"] <= 0.0:
                continue
            dev = np.asarray(acc["M"]) / acc["T"]
            seen.append(k)
            n_effs.append(acc["T"] * acc["T"] / acc["Q"])
            means.append(center + dev)
            covs.append(np.asarray(acc["S"]) / acc["T"] - np.outer(dev, dev))
        missing_share_statistics(segments, ref.ids.tolist(), ref.n_eff,
                                 (self._state.get("baseline_info") or {}).get("missing_share"),
                                 d, values, noise, detail)
        if not seen:
            return self._fit_statistics(win, ref, values, noise, detail)
        at = np.array(seen)
        ids = ref.ids[at].tolist()
        n_effs, means, covs = np.array(n_effs), np.array(means), np.array(covs)
        ref_n = ref.n_eff[at]
        shifts = factors.mahalanobis(means, at)
        shift_noise = np.atleast_1d(mean_shift_noise(n_effs, d, ref_n))
        for i, sid in enumerate(ids):
            values[(sid, "mean_shift")] = float(shifts[i])
            noise[(sid, "mean_shift")] = float(shift_noise[i])
            detail[sid].update(n_eff=float(n_effs[i]), mean=means[i], cov=covs[i],
                               t2=float(n_effs[i] * shifts[i] ** 2))
        diag = np.diagonal(covs, axis1=1, axis2=2)
        if cov_type == "diag":
            compared = diag[:, :, None] * np.eye(d)
        elif cov_type == "spherical":
            compared = diag.mean(axis=1)[:, None, None] * np.eye(d)
        else:
            compared = covs
        usable = (n_effs > d + 1) & np.all(diag > 0, axis=1) & _positive_definite(compared)
        if usable.any():
            log_ratio = factors.log_variance_ratio(compared[usable], at[usable])
            spread = np.atleast_1d(spread_noise(n_effs[usable], d, cov_type, ref_n[usable]))
            for i, sid in enumerate(np.asarray(ids)[usable].tolist()):
                values[(sid, "spread_ratio")] = abs(float(log_ratio[i])) / (2 * d)
                noise[(sid, "spread_ratio")] = float(spread[i]) / (2 * d)
        if self.monitor.wants_feature_shift():
            ref_sd = np.sqrt(np.diagonal(ref.covariances[at], axis1=1, axis2=2))
            # each feature over the rows that observed it (missing_drift)
            f_means, f_neff = observed_feature_means(segments, ids, center, means, n_effs)
            z = np.abs(f_means - ref.means[at]) / ref_sd
            inv_ref = np.where(np.isinf(ref_n), 0.0, 1.0 / ref_n)
            with np.errstate(divide="ignore"):
                f_noise = np.sqrt(1.0 / f_neff + inv_ref[:, None])
            for i, sid in enumerate(ids):
                for j, f in enumerate(features):
                    if f_neff[i, j] > 0.0:
                        values[(sid, _feature_stat(f))] = float(z[i, j])
                        noise[(sid, _feature_stat(f))] = float(f_noise[i, j])
        return self._fit_statistics(win, ref, values, noise, detail)

    def _shape_statistics(self) -> list[str]:
        stats = ["mean_shift", "spread_ratio"]
        if self.monitor.wants_feature_shift():
            stats += [_feature_stat(f) for f in self.monitor.features]
        return stats

    def _fit_statistics(self, win, ref: Baseline, values, noise, detail):
        n = win["n"]
        center = np.asarray(win["center"])
        if n >= 2 and math.isfinite(ref.log_density):
            mean_ld = win["ld"] / n
            var = max(win["ld2"] / n - mean_ld * mean_ld, 0.0) * n / (n - 1)
            values[(WHOLE_MODEL, "fit_drop")] = ref.log_density - mean_ld
            noise[(WHOLE_MODEL, "fit_drop")] = math.sqrt(var / n)
            u = win["unusual"]
            detail[WHOLE_MODEL] = {"mean_log_density": mean_ld, "n": n, "unusual": u["n"],
                                   "unusual_mean": None if not u["n"] else
                                   center + np.asarray(u["sum"]) / u["n"],
                                   "unusual_by_segment": u["by_segment"]}
        return values, noise, detail

    # -- events -> alerts ------------------------------------------------------------
    def _event(self, e: dict, detail: dict, ref: Baseline, info: dict) -> None:
        st = self.state
        seg, stat = e["segment"], e["statistic"]
        key = f"{seg}|{stat}"
        if e["status"] == "raised":
            windows = [w for w in st["recent"] if w["index"] >= e["first_at"]]
            payload = {
                "schema_version": PAYLOAD_SCHEMA_VERSION,
                "id": alert_id(st["baseline_number"], seg, stat, e["first_at"]),
                "kind": "drift",
                "status": "raised",
                "severity": self._severity(stat, e["value"], e["bound"]),
                "segment": seg if seg == WHOLE_MODEL else int(seg),
                "statistic": stat,
                "unit": STATISTIC_UNITS[stat.split("[")[0]],
                "value": _num(_shown(stat, e["value"])),
                "bound": _num(_shown(stat, e["bound"])),
                "noise": _num(_shown_noise(stat, e["noise"])),
                "model_version": {"first": min(w["versions"][0] for w in windows),
                                  "last": self.version},
                "rows": {"first": windows[0]["rows"][0], "last": info["rows"][1]},
                "time": _span([w["time"] for w in windows]),
                "inputs": _files(windows),
                "windows": {"first": e["first_at"], "last": e["at"],
                            "rows_each": self.window_rows},
                "baseline": {k: v for k, v in (st["baseline_info"] or {}).items()
                              if k in ("number", "model_version", "row")},
                "explanation": self._explain(seg, stat, detail, ref),
            }
            st["open"][key] = {"payload": payload}
            self._emit(payload)
        else:
            opened = st["open"].pop(key, None)
            base = opened["payload"] if opened else {
                "schema_version": PAYLOAD_SCHEMA_VERSION,
                "id": alert_id(st["baseline_number"], seg, stat, e["first_at"] or e["at"]),
                "kind": "drift", "segment": seg, "statistic": stat,
                "unit": STATISTIC_UNITS[stat.split("[")[0]],
                "model_version": {"first": self.version}, "rows": {"first": info["rows"][0]},
                "severity": "major", "baseline": None}
            windows = st["recent"][-self.drift.resolve_persist:]
            payload = dict(base)
            payload.update({
                "status": "cleared",
                "value": _num(_shown(stat, e["value"])),
                "bound": _num(_shown(stat, e["bound"])),
                "noise": _num(_shown_noise(stat, e["noise"])),
                "peak": _num(_shown(stat, e["peak"])),
                "model_version": {"first": base["model_version"]["first"], "last": self.version},
                "rows": {"first": base["rows"]["first"], "last": info["rows"][1]},
                "time": _span(([[base["time"]["first"], base["time"]["last"]]]
                               if base.get("time") else []) + [w["time"] for w in windows]),
                "inputs": _files(windows),
                "explanation": self._explain(seg, stat, detail, ref),
            })
            st["cool"][key] = e["at"] + self.drift.cool_down_windows
            self._emit(payload)

    def _emit(self, payload: dict) -> None:
        self.alerts.append((f"{payload['id']}.{payload['status']}", payload))

    def log_alerts(self, model_version: int) -> None:
        """One log line per alert; called once they are committed."""
        self._log_times_dropped()
        for _, payload in self.alerts:
            level = logging.WARNING if payload["status"] == "raised" else logging.INFO
            log_event(f"alert_{payload['status']}", level, id=payload["id"],
                      model_version=model_version, severity=payload.get("severity"),
                      segment=payload.get("segment"), statistic=payload.get("statistic"),
                      value=payload.get("value"), bound=payload.get("bound"),
                      summary=(payload.get("explanation") or {}).get("summary"))

    def _severity(self, stat, value, bound) -> str:
        """X.733 perceived severity: ``critical`` at ``critical_multiple`` times the bound,
        ``major`` past the bound (segment events are ``warning``)."""
        return "critical" if value >= self.drift.critical_multiple * bound else "major"

    def _explain(self, seg, stat, detail, ref: Baseline) -> dict:
        names = self.monitor.features
        if seg == WHOLE_MODEL:
            return self._explain_fit(detail.get(WHOLE_MODEL), ref)
        info = detail.get(seg, {})
        if stat == "missing_share":
            return self._explain_missing(seg, info)
        if "mean" not in info:
            share = info.get("share", 0.0)
            return {"summary": f"segment {seg} took {share:.1%} of the window's rows "
                               f"(baseline weight {info.get('baseline_weight', 0.0):.1%}) "
                               "and had no rows to compare",
                    "share": share, "baseline_weight": info.get("baseline_weight")}
        moved = moves_in_data_units(explain(ref, seg, info["mean"], feature_names=names),
                                    self.transforms)
        out = {"features": moved, "share": info["share"],
               "baseline_weight": info["baseline_weight"], "effective_rows": info["n_eff"]}
        if stat == "mean_shift":   # T^2 = n_eff d^2 against chi-square(D) (scipy.stats.chi2)
            out["hotelling_t2"] = info["t2"]
            out["p_value"] = float(hotelling_t2_pvalue(info["t2"], len(names)))
        if stat == "spread_ratio":
            k = ref.index_of(seg)
            ratio = np.sqrt(np.maximum(np.diag(info["cov"]), 0.0) /
                            np.diag(ref.covariances[k]))
            order = sorted(range(len(names)), key=lambda j: (-abs(math.log(max(ratio[j], 1e-300))), j))
            out["spreads"] = [{"feature": names[j],
                               "baseline_sd": float(math.sqrt(ref.covariances[k][j, j])),
                               "window_sd": float(math.sqrt(max(info["cov"][j, j], 0.0))),
                               "ratio": float(ratio[j])} for j in order]
            top = ", ".join(f"{s['feature']} sd {_fmt(s['baseline_sd'])} -> "
                            f"{_fmt(s['window_sd'])} (x{s['ratio']:.2f})"
                            for s in out["spreads"][:_TOP_FEATURES])
            out["summary"] = f"segment {seg} spread changed: {top}"
        elif stat == "weight_change":
            out["summary"] = (f"segment {seg} took {info['share']:.1%} of the rows against a "
                              f"baseline weight of {info['baseline_weight']:.1%}; "
                              + _moves(moved))
        else:
            out["summary"] = f"segment {seg} moved: " + _moves(moved)
        note = missing_note(info, names)
        if note:
            out["summary"] += f"; {note}"
        return out

    def _explain_missing(self, seg, info) -> dict:
        names = self.monitor.features
        m = info.get("missing") or {}
        if not m:
            return {"summary": f"segment {seg} had no rows to compare"}
        f = names[m["feature"]]
        if m["share"] == m["baseline_share"]:
            summary = (f"segment {seg}: no feature missing from a share of its rows other "
                       "than the baseline's")
        else:
            summary = (f"feature {f} missing from {m['share']:.1%} of segment {seg}'s rows "
                       f"(baseline {m['baseline_share']:.1%})")
        return {"summary": summary,
                "feature": f, "share": m["share"], "baseline_share": m["baseline_share"],
                "shares": {names[j]: s for j, s in enumerate(m["shares"])},
                "effective_rows": info.get("n_eff")}

    def _explain_fit(self, info, ref: Baseline) -> dict:
        if not info:
            return {"summary": "no rows"}
        out = {"mean_log_density": info["mean_log_density"],
               "baseline_log_density": float(ref.log_density),
               "unusual_rows": info["unusual"], "rows": info["n"],
               "expected_unusual_share": self.monitor.settings.output.unusual_quantile}
        head = (f"mean log-density {_fmt(info['mean_log_density'])} against "
                f"{_fmt(ref.log_density)} nats/row at the baseline; "
                f"{info['unusual'] / info['n']:.1%} of rows unusual (expected "
                f"{self.monitor.settings.output.unusual_quantile:.1%})")
        by_seg = info["unusual_by_segment"]
        if info["unusual"] and by_seg:
            near = max(by_seg, key=lambda s: (by_seg[s], -int(s)))
            if int(near) in set(ref.ids.tolist()):
                moved = moves_in_data_units(explain(ref, int(near), info["unusual_mean"],
                                                    feature_names=self.monitor.features),
                                            self.transforms)
                out.update(nearest_segment=int(near), features=moved)
                head += (f"; most are labelled segment {near}, from whose baseline they "
                         f"differ: " + _moves(moved))
        out["summary"] = head
        return out

    # -- outputs ---------------------------------------------------------------------
    def segment_drift(self) -> dict[str, dict]:
        """Per segment id (str): the last window's statistics, noise and bounds."""
        return self.last_values


def _merge_sums(into: dict | None, win: dict) -> dict:
    if into is None:
        into = {"n": 0, "ld": 0.0, "segments": {}, "center": win["center"]}
    into["n"] += win["n"]
    into["ld"] += win["ld"]
    for sid, acc in win["segments"].items():
        old = into["segments"].setdefault(sid, {"T": 0.0, "Q": 0.0, "M": None, "S": None})
        old["T"] += acc["T"]
        old["Q"] += acc["Q"]
        old["M"] = _add(old["M"], acc["M"])
        old["S"] = _add(old["S"], acc["S"])
        for key in ("miss", "miss2", "imputed"):
            if acc.get(key) is not None:
                old[key] = _add(old.get(key), acc[key])
    return into


def _baseline_from_sums(sums: dict, mixture: Mixture) -> Baseline:
    """A baseline from the rows themselves; a segment with too few rows for a covariance
    keeps the model's mean and covariance."""
    model = Baseline.from_mixture(mixture)
    d = mixture.n_features
    center = np.asarray(sums["center"])
    n = sums["n"]
    weights, means = model.weights.copy(), model.means.copy()
    covs, n_eff = model.covariances.copy(), model.n_eff.copy()
    for k, sid in enumerate(model.ids.tolist()):
        acc = sums["segments"].get(str(sid))
        weights[k] = acc["T"] / n if acc else 0.0
        if not acc or acc["Q"] <= 0 or acc["T"] ** 2 / acc["Q"] <= d + 1:
            continue
        dev = np.asarray(acc["M"]) / acc["T"]
        cov = np.asarray(acc["S"]) / acc["T"] - np.outer(dev, dev)
        if mixture.covariance == "diag":
            cov = np.diag(np.diag(cov))
        elif mixture.covariance == "spherical":
            cov = np.eye(d) * np.diag(cov).mean()
        if np.all(np.linalg.eigvalsh(cov) > 0):
            means[k], covs[k] = center + dev, cov
            n_eff[k] = acc["T"] ** 2 / acc["Q"]
    return Baseline(ids=model.ids, weights=weights, means=means, covariances=covs,
                     n_eff=n_eff, total_n_eff=float(n), log_density=sums["ld"] / n,
                     covariance=mixture.covariance)


def _moves(moved) -> str:
    return ", ".join(f"{m['feature']} {_fmt(m['baseline_mean'])} -> {_fmt(m['window_mean'])} "
                     + (f"(median, {m['shift_sd']:+.2f} sd of {m['transform']})"
                        if m.get("centre") == "median" else f"({m['shift_sd']:+.2f} sd)")
                     for m in moved[:_TOP_FEATURES])


def _shown(stat, v):
    """A statistic as users read it (spread_ratio is evaluated on its log)."""
    if v is None:
        return math.nan
    return math.exp(v) if stat == "spread_ratio" else v


def _shown_noise(stat, v):
    return math.exp(v) if stat == "spread_ratio" and v is not None else v


def _files(windows) -> list[str]:
    out: list[str] = []
    for w in windows:
        for f in w["files"]:
            if f not in out:
                out.append(f)
    return out


def _time_kind(value) -> str:
    """Times in a window's range are numbers or text (ISO times); never both."""
    return "number" if isinstance(value, (int, float)) and not isinstance(value, bool) \
        else "text"


def _span(pairs):
    pairs = [p for p in pairs if p]
    if not pairs:
        return None
    kind = _time_kind(pairs[-1][0])   # the latest kind, if the column changed kind
    pairs = [p for p in pairs if _time_kind(p[0]) == kind]
    return {"first": min(p[0] for p in pairs), "last": max(p[1] for p in pairs)}
