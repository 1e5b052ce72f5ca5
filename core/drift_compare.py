"""A whole mixture, or one batch of scored rows, against the drift baseline.

:func:`segment_drift` compares every segment of a current mixture with its baseline
(matched by id), :func:`batch_drift` one batch's responsibility-weighted means and
shares, :func:`fit_drop` the batch's mean log-density against the baseline level;
each result gives ``(values, noise)`` for :func:`shoal.core.drift_bounds.evaluate_bounds`.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from .baseline import WHOLE_MODEL, Baseline
from .distances import (
    hellinger_distance,
    hotelling_t2_pvalue,
    kish_effective_sample_size,
    log_generalised_variance_ratio,
    mahalanobis_distance,
)
from .drift_noise import fit_noise, hellinger_noise, mean_shift_noise, spread_noise, weight_noise
from .errors import ModelError
from .mixture import Mixture

__all__ = ["SegmentDrift", "segment_drift", "BatchDrift", "batch_drift", "FitDrop", "fit_drop"]

# --------------------------------------------------------------------- model vs baseline


def _matched(baseline: Baseline, ids):
    """Positions of the ids common to both, in baseline order."""
    ids = np.asarray(ids, dtype=np.int64)
    in_ref = np.flatnonzero(np.isin(baseline.ids, ids))
    current = np.array([int(np.flatnonzero(ids == baseline.ids[i])[0]) for i in in_ref],
                       dtype=np.int64)
    return in_ref, current


def _keyed(ids, table):
    """``{(segment, statistic): value}`` from ``{statistic: array over ids}``."""
    return {(int(seg), name): float(column[j])
            for name, column in table.items() for j, seg in enumerate(ids)}


@dataclass(frozen=True, eq=False)
class SegmentDrift:
    """Drift of each segment of a mixture against the baseline.

    Attributes
    ----------
    ids : ndarray of int64, shape (n_matched,)
        Segments present in both, in baseline order.
    n_eff : ndarray of shape (n_matched,)
        Effective rows behind each current segment (``weight * mixture.n_eff``).
    means : ndarray of shape (n_matched, n_features)
        Current means, data units.
    values : dict of str to ndarray of shape (n_matched,)
        ``mean_shift``, ``spread_change`` (signed), ``hellinger``, ``weight_change``.
    noise : dict of str to ndarray of shape (n_matched,)
        The noise level of each statistic (see the module notes).
    new_ids : ndarray of int64
        Segments of the mixture without a baseline.
    missing_ids : ndarray of int64
        Referenced segments no longer in the mixture.
    """

    ids: np.ndarray
    n_eff: np.ndarray
    means: np.ndarray
    values: dict
    noise: dict
    new_ids: np.ndarray
    missing_ids: np.ndarray

    def bound_inputs(self) -> tuple[dict, dict]:
        """``(values, noise)`` keyed by ``(segment, statistic)`` for :func:`evaluate_bounds`.

        ``spread_change`` enters as its magnitude.

        Returns
        -------
        values, noise : dict
            Keyed by ``(segment, statistic)``.
        """
        values = dict(self.values, spread_change=np.abs(self.values["spread_change"]))
        return _keyed(self.ids, values), _keyed(self.ids, self.noise)


def segment_drift(baseline: Baseline, mixture: Mixture) -> SegmentDrift:
    """Compare every segment of ``mixture`` with its baseline, matched by id.

    Parameters
    ----------
    baseline : Baseline
    mixture : Mixture
        Must have the baseline's number of features.

    Returns
    -------
    drift : SegmentDrift
    """
    if mixture.n_features != baseline.n_features:
        raise ModelError(
            f"the mixture has {mixture.n_features} features, the baseline "
            f"{baseline.n_features}"
        )
    ref_at, cur_at = _matched(baseline, mixture.ids)
    d = baseline.n_features
    ref_means, ref_covs = baseline.means[ref_at], baseline.covariances[ref_at]
    means = mixture.data_means()[cur_at]
    covs = mixture.data_covariance_matrices()[cur_at]
    weights = mixture.weights[cur_at]
    n_eff = weights * mixture.n_eff
    ref_n = baseline.n_eff[ref_at]
    if ref_at.size:
        values = {
            "mean_shift": np.atleast_1d(mahalanobis_distance(means, ref_means, ref_covs)),
            "spread_change": np.atleast_1d(log_generalised_variance_ratio(covs, ref_covs)),
            "hellinger": np.atleast_1d(hellinger_distance(ref_means, ref_covs, means, covs)),
        }
    else:
        values = {name: np.empty(0) for name in ("mean_shift", "spread_change", "hellinger")}
    values["weight_change"] = np.abs(weights - baseline.weights[ref_at])
    noise = {
        "mean_shift": np.atleast_1d(mean_shift_noise(n_eff, d, ref_n)),
        "spread_change": np.atleast_1d(spread_noise(n_eff, d, mixture.covariance, ref_n)),
        "hellinger": np.atleast_1d(hellinger_noise(n_eff, d, mixture.covariance, ref_n)),
        "weight_change": np.atleast_1d(weight_noise(
            baseline.weights[ref_at], mixture.n_eff, baseline.total_n_eff)),
    }
    return SegmentDrift(
        ids=baseline.ids[ref_at], n_eff=n_eff, means=means, values=values, noise=noise,
        new_ids=mixture.ids[~np.isin(mixture.ids, baseline.ids)],
        missing_ids=baseline.ids[~np.isin(baseline.ids, mixture.ids)],
    )


# ----------------------------------------------------------------------- batch vs baseline


@dataclass(frozen=True, eq=False)
class BatchDrift:
    """One batch of rows against the baseline, segment by segment.

    Attributes
    ----------
    ids : ndarray of int64, shape (n_matched,)
        Referenced segments among the responsibility columns, in baseline order.
    n_eff : ndarray of shape (n_matched,)
        Kish's effective sample size of each segment's responsibilities (0 if none).
    share : ndarray of shape (n_matched,)
        Each segment's share of the batch's responsibility.
    means : ndarray of shape (n_matched, n_features)
        Responsibility-weighted batch means, data units (``nan`` where ``n_eff`` is 0).
    t2, p_value : ndarray of shape (n_matched,)
        Hotelling's ``T^2 = n_eff d^2`` against the baseline mean and covariance, and
        its chi-square p-value (``nan`` where ``n_eff`` is 0).
    values, noise : dict of str to ndarray of shape (n_matched,)
        ``batch_mean_shift`` (baseline sds) and ``batch_weight_change``.
    """

    ids: np.ndarray
    n_eff: np.ndarray
    share: np.ndarray
    means: np.ndarray
    t2: np.ndarray
    p_value: np.ndarray
    values: dict
    noise: dict

    def bound_inputs(self) -> tuple[dict, dict]:
        """The statistics for :func:`~shoal.core.drift_bounds.evaluate_bounds`.

        Returns
        -------
        values, noise : dict
            Keyed by ``(segment, statistic)``.
        """
        return _keyed(self.ids, self.values), _keyed(self.ids, self.noise)


def batch_drift(baseline: Baseline, X, resp, ids) -> BatchDrift:
    """Test each segment's batch mean and share against the baseline.

    Parameters
    ----------
    baseline : Baseline
    X : array_like of shape (n_samples, n_features)
        The batch's rows in data units.
    resp : array_like of shape (n_samples, n_components)
        Their responsibilities (``Scores.resp``).
    ids : array_like of int, shape (n_components,)
        The segment id of each responsibility column (``mixture.ids``).

    Returns
    -------
    drift : BatchDrift
        The noise of ``batch_mean_shift`` is ``sqrt(D (1 / n_eff + 1 / n_ref))`` and of
        ``batch_weight_change`` ``sqrt(w (1 - w) (1 / n_rows + 1 / N_ref))``.
    """
    X = np.asarray(X, dtype=np.float64)
    resp = np.asarray(resp, dtype=np.float64)
    ids = np.asarray(ids, dtype=np.int64)
    d = baseline.n_features
    if X.ndim != 2 or X.shape[1] != d:
        raise ModelError(f"X should have shape (n_samples, {d}), got {X.shape}")
    if resp.shape != (X.shape[0], ids.shape[0]):
        raise ModelError(
            f"resp should have shape ({X.shape[0]}, {ids.shape[0]}), got {resp.shape}"
        )
    if not (np.all(np.isfinite(X)) and np.all(np.isfinite(resp))):
        raise ModelError("X and resp should be finite")
    ref_at, cur_at = _matched(baseline, ids)
    weights = resp[:, cur_at]
    n_rows = X.shape[0]
    totals = weights.sum(axis=0)
    n_eff = np.atleast_1d(kish_effective_sample_size(weights, axis=0))
    means = np.full((cur_at.size, d), np.nan)
    seen = totals > 0
    means[seen] = (weights[:, seen].T @ X) / totals[seen, None]
    shift = np.full(cur_at.size, np.nan)
    if np.any(seen):
        shift[seen] = mahalanobis_distance(
            means[seen], baseline.means[ref_at][seen], baseline.covariances[ref_at][seen]
        )
    t2 = n_eff * shift**2
    p_value = np.asarray(hotelling_t2_pvalue(t2, d), dtype=np.float64).reshape(t2.shape)
    share = totals / n_rows if n_rows else np.full(cur_at.size, np.nan)
    ref_weights = baseline.weights[ref_at]
    values = {
        "batch_mean_shift": shift,
        "batch_weight_change": np.abs(share - ref_weights),
    }
    noise = {
        "batch_mean_shift": np.atleast_1d(mean_shift_noise(n_eff, d, baseline.n_eff[ref_at])),
        "batch_weight_change": np.atleast_1d(
            weight_noise(ref_weights, float(n_rows), baseline.total_n_eff)),
    }
    return BatchDrift(ids=baseline.ids[ref_at], n_eff=n_eff, share=share, means=means,
                      t2=t2, p_value=p_value, values=values, noise=noise)


class FitDrop(NamedTuple):
    """How much worse a batch fits than the baseline level.

    Attributes
    ----------
    value : float
        Baseline mean log-density per row minus the batch's (nats per row).
    noise : float
        Its standard error.
    n_rows : int
    """

    value: float
    noise: float
    n_rows: int

    def bound_inputs(self) -> tuple[dict, dict]:
        """The statistic for :func:`~shoal.core.drift_bounds.evaluate_bounds`.

        Returns
        -------
        values, noise : dict
            Keyed ``(WHOLE_MODEL, "fit_drop")``.
        """
        key = (WHOLE_MODEL, "fit_drop")
        return {key: self.value}, {key: self.noise}


def fit_drop(baseline: Baseline, log_density) -> FitDrop:
    """Baseline mean log-density per row minus the batch's, with its standard error.

    Parameters
    ----------
    baseline : Baseline
        Its ``log_density`` must be known.
    log_density : array_like of shape (n_samples,)
        ``Scores.log_density`` of the batch (data units).

    Returns
    -------
    FitDrop
    """
    if not math.isfinite(baseline.log_density):
        raise ModelError("the baseline has no log-density level; take it with log_density=")
    values = np.asarray(log_density, dtype=np.float64).ravel()
    if not np.all(np.isfinite(values)):
        raise ModelError("log_density should be finite")
    value = baseline.log_density - float(np.mean(values)) if values.size else math.nan
    return FitDrop(value=value, noise=fit_noise(values), n_rows=int(values.size))


