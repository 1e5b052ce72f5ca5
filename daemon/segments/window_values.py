"""A closing window's statistics keyed for the bounds, and the details alerts read.

:func:`window_values` asks the core for every segment's statistics of one window
(:func:`shoal.core.window_statistics.segment_statistics`, over arrays) and keys them
``(segment id, statistic)`` with their noise levels, as
:func:`shoal.core.drift.evaluate_bounds` takes them: a statistic that was not measured
has no key (no evidence either way), and a segment that lost most of its rows has its
shape statistics at 0 (not crossing). The per-segment details an explanation needs
are built only for the segments an alert is about.
"""
from __future__ import annotations

import numpy as np

from shoal.core.drift import WHOLE_MODEL
from shoal.core.window_statistics import WindowSums, fit_statistics, segment_statistics
from shoal.daemon.segments.window_sums import baseline_missing_shares

__all__ = ["SHAPE_MIN_SHARE", "feature_stat", "window_values"]

SHAPE_MIN_SHARE = 0.25
"""A segment whose share of a window's rows is under this fraction of its baseline
weight is not measured for mean, spread or feature shifts in that window (it counts
as not crossing): the few rows it still takes are mostly its neighbours' tails. Its
``weight_change`` says what happened."""


def feature_stat(name: str) -> str:
    """The statistic name of one feature's mean shift."""
    return f"feature_shift[{name}]"


def window_values(win: dict, ref, factors, sums: WindowSums, features, *,
                  feature_shift: bool, missing_share: dict | None,
                  ref_spread_variance=None):
    """``(values, noise, detail)`` of one closing window.

    ``win`` is the window's record, ``ref`` the baseline and ``factors`` its Gaussians
    factorised, ``sums`` the window's sums in the baseline's order of segment ids,
    ``missing_share`` the baseline's missing shares by segment id (and
    ``ref_spread_variance`` the baseline's part of the spread noise, if kept)."""
    ids = ref.ids.tolist()
    stats = segment_statistics(
        ref, factors, win["n"], sums, win["center"], min_share=SHAPE_MIN_SHARE,
        baseline_missing=baseline_missing_shares(missing_share, ids, len(features)),
        feature_shift=feature_shift, ref_spread_variance=ref_spread_variance)
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
    fit = fit_statistics(ref.log_density, win["n"], win["ld"], win["ld2"])
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
