"""A closing window's statistics keyed for the bounds, and the details alerts read.

:func:`window_values` keys one window's statistics (every segment's, from
:func:`shoal.core.window_statistics.window_statistics`, over arrays) as
``(segment id, statistic)`` with their noise levels, as
:func:`shoal.core.drift.evaluate_bounds` takes them: a statistic that was not measured
has no key (no evidence either way), and a segment that lost most of its rows has its
shape statistics at 0 (not crossing). The per-segment details an explanation needs
are built only for the segments an alert is about. :func:`quiet_windows` tells, for
several windows at once, which have no statistic past its bound (their keying is
skipped: on a stream without drift, nearly every window).
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np

from shoal.core.drift import WHOLE_MODEL
from shoal.core.window_statistics import SegmentStatistics, fit_statistics

__all__ = ["SEGMENT_STATISTICS", "SHAPE_MIN_SHARE", "feature_stat", "settings_bounds",
           "window_values", "window_fit", "quiet_windows"]

SEGMENT_STATISTICS = ("mean_shift", "spread_ratio", "weight_change", "missing_share")

SHAPE_MIN_SHARE = 0.25
"""A segment whose share of a window's rows is under this fraction of its baseline
weight is not measured for mean, spread or feature shifts in that window (it counts
as not crossing): the few rows it still takes are mostly its neighbours' tails. Its
``weight_change`` says what happened."""


def feature_stat(name: str) -> str:
    """The statistic name of one feature's mean shift."""
    return f"feature_shift[{name}]"


def settings_bounds(drift, features, segment_ids) -> dict:
    """The bound of every statistic (keys ``statistic``) and of every overridden
    (segment, statistic) pair of ``segment_ids``, from the ``drift`` settings'
    ``bounds`` and ``overrides`` (spread_ratio on its log scale, as it is evaluated)."""
    b = drift.bounds
    out: dict[Any, float] = {}

    def put(key, stat, value):
        if value is None:
            return
        out[key] = math.log(value) if stat == "spread_ratio" else float(value)

    for stat in SEGMENT_STATISTICS + ("fit_drop",):
        put(stat, stat, getattr(b, stat))
    for f in features:
        put(feature_stat(f), "feature_shift", b.feature_shift)
    for o in drift.overrides:       # feature-wide first, then segment-specific
        if o.segment is None and o.feature is not None:
            put(feature_stat(o.feature), "feature_shift", o.feature_shift)
    for o in drift.overrides:
        if o.segment is None or o.segment not in segment_ids:
            continue
        for stat in SEGMENT_STATISTICS:
            put((o.segment, stat), stat, getattr(o, stat))
        feats = [o.feature] if o.feature is not None else features
        for f in feats:
            put((o.segment, feature_stat(f)), "feature_shift", o.feature_shift)
    return out


def window_fit(ref, win: dict):
    """``fit_drop``, its noise and the window's mean log-density (or None)."""
    return fit_statistics(ref.log_density, win["n"], win["ld"], win["ld2"])


def quiet_windows(stats: SegmentStatistics, fits, bounds: dict, ids, features, *,
                  feature_shift: bool, noise_multiple: float) -> np.ndarray:
    """Which of ``W`` windows have no statistic that crosses its bound (a value past it
    and past ``noise_multiple`` times its noise), from their statistics (``W * K``
    rows, :func:`shoal.core.window_statistics.window_statistics`), their
    :func:`window_fit` and the bounds (keyed as :meth:`DriftMonitor.bounds`). A
    quiet window changes no bound state that holds no entry."""
    K = len(ids)
    W = len(fits)

    def bound_of(stat):
        return np.array([np.nan if b is None else b for b in
                         (bounds.get((sid, stat), bounds.get(stat)) for sid in ids)])

    def crossing(value, level, bound):
        with np.errstate(invalid="ignore"):
            return (value > bound) & (value > noise_multiple * level)

    loud = np.zeros((W, K), dtype=bool)
    for stat, value, level in (("weight_change", stats.weight_change, stats.weight_noise),
                               ("missing_share", stats.missing_share, stats.missing_noise),
                               ("mean_shift", stats.mean_shift, stats.mean_shift_noise),
                               ("spread_ratio", stats.spread, stats.spread_noise)):
        loud |= crossing(value.reshape(W, K), level.reshape(W, K), bound_of(stat))
    if feature_shift and stats.feature_shift is not None:
        d = len(features)
        fb = np.stack([bound_of(feature_stat(f)) for f in features], axis=1)
        loud |= crossing(stats.feature_shift.reshape(W, K, d),
                         stats.feature_noise.reshape(W, K, d), fb).any(axis=2)
    quiet = ~loud.any(axis=1)
    fit_bound = bounds.get((WHOLE_MODEL, "fit_drop"), bounds.get("fit_drop"))
    if fit_bound is not None:
        for w, fit in enumerate(fits):
            if fit is not None and fit[0] > fit_bound and fit[0] > noise_multiple * fit[1]:
                quiet[w] = False
    return quiet


def window_values(win: dict, ref, stats: SegmentStatistics, fit, features, *,
                  feature_shift: bool):
    """``(values, noise, detail)`` of one closing window.

    ``win`` is the window's record, ``ref`` the baseline, ``stats`` the window's
    statistics (rows in the baseline's order of segment ids) and ``fit`` its
    :func:`window_fit`."""
    ids = ref.ids.tolist()
    values, noise = {}, {}
    shape = ["mean_shift", "spread_ratio"]
    if feature_shift:
        shape += [feature_stat(f) for f in features]
    for k, sid in enumerate(ids):
        values[(sid, "weight_change")] = float(stats.weight_change[k])
        noise[(sid, "weight_change")] = float(stats.weight_noise[k])
        if stats.low[k]:
            for stat in shape:
                values[(sid, stat)], noise[(sid, stat)] = 0.0, 0.0
    _put(values, noise, ids, "missing_share", stats.missing_share, stats.missing_noise)
    _put(values, noise, ids, "mean_shift", stats.mean_shift, stats.mean_shift_noise)
    _put(values, noise, ids, "spread_ratio", stats.spread, stats.spread_noise)
    if feature_shift:
        for j, f in enumerate(features):
            _put(values, noise, ids, feature_stat(f), stats.feature_shift[:, j],
                 stats.feature_noise[:, j])
    detail = _Details(ids, ref.weights, stats)
    if fit is not None:
        values[(WHOLE_MODEL, "fit_drop")], noise[(WHOLE_MODEL, "fit_drop")], mean_ld = fit
        u = win["unusual"]
        detail[WHOLE_MODEL] = {"mean_log_density": mean_ld, "n": win["n"], "unusual": u["n"],
                               "unusual_mean": None if not u["n"] else
                               np.asarray(win["center"]) + np.asarray(u["sum"]) / u["n"],
                               "unusual_by_segment": u["by_segment"]}
    return values, noise, detail


def _put(values: dict, noise: dict, ids, stat: str, value: np.ndarray,
         level: np.ndarray) -> None:
    """``values``/``noise`` of ``stat`` for the segments where it was measured."""
    for k in np.flatnonzero(~np.isnan(value)).tolist():
        values[(ids[k], stat)] = float(value[k])
        noise[(ids[k], stat)] = float(level[k])


class _Details(dict):
    """Per segment id: what the explanations need of a window (share, effective rows,
    mean, covariance, Hotelling's T^2, missing shares), built only for the segments an
    alert is about."""

    def __init__(self, ids, weights, stats):
        super().__init__()
        self._at = {sid: k for k, sid in enumerate(ids)}
        self._weights = weights
        self._stats = stats

    def get(self, seg, default=None):
        if seg in self or seg not in self._at:
            return super().get(seg, default)
        k, s = self._at[seg], self._stats
        info = {"share": float(s.share[k]), "baseline_weight": float(self._weights[k]),
                "n_eff": 0.0}
        if s.seen[k]:
            info.update(n_eff=float(s.n_eff[k]), mean=s.means[k], cov=s.covs[k],
                        t2=float(s.t2[k]))
        if s.missing[k]:
            j = int(s.missing_feature[k])
            info["missing"] = {"feature": j, "share": float(s.missing_shares[k, j]),
                               "baseline_share": float(s.missing_baseline[k, j]),
                               "shares": s.missing_shares[k].tolist()}
        self[seg] = info
        return info
