"""Drift of each segment against a baseline, the noise of every statistic, and bounds.

A :class:`Baseline` keeps, per stable segment id, the weight, mean and covariance
matrix in the data's own units and how many effective rows stood behind them, plus
the mean log-density per row of the data around the snapshot. One window's statistics
of every segment against it (mean shift in baseline sds, spread change, weight change,
fit drop, missing share) are computed from the window's sums in
:mod:`shoal.core.window_statistics`, their noise levels in :mod:`shoal.core.drift_noise`,
the raised and cleared decisions in :mod:`shoal.core.drift_bounds`; :func:`explain`
says which features of a segment moved. This module names them all for its callers.
"""

from __future__ import annotations

import numpy as np

from .baseline import WHOLE_MODEL, Baseline
from .drift_bounds import evaluate_bounds
from .drift_noise import mean_shift_noise, spread_noise, weight_noise
from .errors import ModelError
from .window_statistics import add_segment_scatter

__all__ = [
    "Baseline",
    "WHOLE_MODEL",
    "evaluate_bounds",
    "explain",
    "mean_shift_noise",
    "spread_noise",
    "weight_noise",
    "add_segment_scatter",
]

# ------------------------------------------------------------------------------ explain


def explain(baseline: Baseline, segment_id, mean, *, feature_names=None, top=None):
    """Which features of a segment moved, most first, in the data's own units.

    Parameters
    ----------
    baseline : Baseline
    segment_id : int
    mean : array_like of shape (n_features,)
        The segment's current mean (or a batch mean), data units.
    feature_names : sequence of str, optional
        Default: ``"x0"``, ``"x1"``, ...
    top : int, optional
        Keep only the first ``top`` features.

    Returns
    -------
    features : list of dict
        ``{"feature", "index", "baseline_mean", "window_mean", "shift_sd"}`` where
        ``shift_sd = (current - baseline) / baseline sd`` of that feature; sorted by
        ``|shift_sd|`` (largest first), ties by index.
    """
    at = baseline.index_of(segment_id)
    d = baseline.n_features
    mean = np.asarray(mean, dtype=np.float64)
    if mean.shape != (d,):
        raise ModelError(f"mean should have shape ({d},), got {mean.shape}")
    names = [f"x{j}" for j in range(d)] if feature_names is None else list(feature_names)
    if len(names) != d:
        raise ModelError(f"feature_names should name {d} features, got {len(names)}")
    ref_mean = baseline.means[at]
    ref_sd = np.sqrt(np.diagonal(baseline.covariances[at]))
    shift = (mean - ref_mean) / ref_sd
    order = sorted(range(d), key=lambda j: (-abs(shift[j]), j))
    rows = [
        {
            "feature": names[j],
            "index": j,
            "baseline_mean": float(ref_mean[j]),
            "window_mean": float(mean[j]),
            "shift_sd": float(shift[j]),
        }
        for j in order
    ]
    return rows if top is None else rows[: int(top)]


