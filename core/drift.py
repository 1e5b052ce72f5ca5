"""Drift of each segment against a baseline, the noise of every statistic, and bounds.

A :class:`Baseline` keeps, per stable segment id, the weight, mean and covariance
matrix in the data's own units and how many effective rows stood behind them, plus
the mean log-density per row of the data around the snapshot. Statistics compare a
current :class:`~shoal.core.mixture.Mixture`, or one batch of scored rows, with it,
segment by segment, matched by id:

``mean_shift``
    Mahalanobis distance of the current mean from the baseline mean under the
    baseline covariance: how many baseline standard deviations the mean moved.
``spread_change``
    ``log |S_now| - log |S_ref|``, the log ratio of generalised variances (signed;
    bounds compare its magnitude).
``hellinger``
    Hellinger distance between the baseline and the current Gaussian, in [0, 1].
``weight_change``
    ``|w_now - w_ref|``.
``batch_mean_shift``
    The responsibility-weighted mean of one batch's rows, in baseline sds, with
    Hotelling's ``T^2 = n_eff d^2`` and its chi-square p-value, ``n_eff`` being
    Kish's effective sample size of the segment's responsibilities.
``batch_weight_change``
    ``|share of the batch's responsibility - w_ref|``.
``fit_drop``
    Baseline mean log-density per row minus the batch's (nats per row; positive
    when the data fit the model worse than they did).

Noise levels. Each statistic comes with the root-mean-square size it reaches from
estimation noise alone when nothing has changed, at the effective sample size of the
estimates. For Gaussian rows, an estimate from ``n`` effective rows in ``D``
features, and a covariance type with ``q`` free parameters per component
(``D (D + 1) / 2`` full, ``D`` diag, ``1`` spherical):

* mean shift: ``n d^2 ~ chi2(D)``, so ``rms = sqrt(D / n)``;
* spread change: ``n S ~ Wishart(n - 1, Sigma)`` gives
  ``var log|S| = sum_{i=1..D} psi1((n - i) / 2)`` (full; ``psi1`` the trigamma
  function), ``D psi1((n - 1) / 2)`` (diag, D independent chi-squares) and
  ``D^2 psi1(D (n - 1) / 2)`` (spherical, one pooled chi-square); all ``~ 2D / n``;
* Hellinger: to second order ``D_B = |delta|^2 / 8 + ||E||_F^2 / 16`` for a whitened
  mean error ``delta`` and covariance error ``E``; ``E|delta|^2 = D / n`` and
  ``E||E||_F^2 = 2 q / n``, and ``H^2 = 1 - exp(-D_B) ~ D_B``, so
  ``rms H = sqrt((D + q) / (8 n))``;
* weight: a share of ``N`` effective rows is binomial, ``sd = sqrt(w (1 - w) / N)``;
* fit: the standard error of a batch mean, ``sd(log-density) / sqrt(n_rows)``.

When the baseline is itself an estimate (from ``n_ref`` effective rows), the two
errors add: the variance is ``v(n) + v(n_ref)``. This is exact for independent
estimates and errs on the large (quiet) side when the two share rows. A segment's
effective rows in a mixture are taken as ``weight * n_eff`` of the mixture (Kish's
``n_eff = 1 / sum w_i^2`` over the rows' step weights); that is exact for hard
assignments that fall at random among the rows.

Bounds. :func:`evaluate_bounds` turns statistics, noise levels and bounds into
raised and cleared events with persistence and hysteresis, keeping its state as a
plain JSON-able dict.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Mapping, NamedTuple

import numpy as np
from scipy import special

from .distances import (
    hellinger_distance,
    hotelling_t2_pvalue,
    kish_effective_sample_size,
    log_generalised_variance_ratio,
    mahalanobis_distance,
)
from .errors import ModelError
from .lifecycle import segment_index
from . import fused
from .mixture import Mixture

__all__ = [
    "BatchDrift",
    "FitDrop",
    "Baseline",
    "SegmentDrift",
    "WHOLE_MODEL",
    "batch_drift",
    "evaluate_bounds",
    "explain",
    "fit_drop",
    "fit_noise",
    "hellinger_noise",
    "mean_shift_noise",
    "segment_drift",
    "spread_noise",
    "weight_noise",
    "add_segment_scatter",
]

def add_segment_scatter(S: np.ndarray, X: np.ndarray, resp_kn: np.ndarray,
                        floor: float) -> None:
    """``S[k] += sum_i resp_kn[k, i] x_i x_i^T`` over the rows whose responsibility for
    ``k`` is above ``floor`` (rows under it add less than that share each; on separated
    segments most rows are left out). ``S`` is (K, D, D), ``X`` (n, D), ``resp_kn`` (K, n).
    One compiled pass where the tiled kernels run, else a gather and a product per
    segment."""
    if fused.enabled() and fused.tiled():
        fused.kernels().gather_syrk(np.ascontiguousarray(X, dtype=np.float64),
                                    np.ascontiguousarray(resp_kn, dtype=np.float64), 0,
                                    np.ones(X.shape[0]), float(np.nextafter(floor, np.inf)),
                                    S)
        return
    for k in range(resp_kn.shape[0]):
        rows = np.flatnonzero(resp_kn[k] > floor)
        if rows.size:
            Xk = X[rows]
            S[k] += (Xk * resp_kn[k, rows, None]).T @ Xk


WHOLE_MODEL = "all"
"""The segment key of statistics about the whole model (``fit_drop``)."""

STATE_FORMAT = 1


# --------------------------------------------------------------------------- baseline


@dataclass(frozen=True, eq=False)
class Baseline:
    """What each segment looked like when the model was last accepted as normal.

    Attributes
    ----------
    ids : ndarray of int64, shape (n_segments,)
    weights : ndarray of shape (n_segments,)
    means : ndarray of shape (n_segments, n_features)
        Data units.
    covariances : ndarray of shape (n_segments, n_features, n_features)
        Full matrices in data units, whatever the model's covariance type.
    n_eff : ndarray of shape (n_segments,)
        Effective rows behind each segment's mean and covariance (``inf``: exact).
    total_n_eff : float
        Effective rows behind the weights.
    log_density : float
        Mean log-density per row of the data around the snapshot (nats; ``nan``
        when not known).
    covariance : str
        Covariance type of the model (sets the spread-change noise).
    """

    ids: np.ndarray
    weights: np.ndarray
    means: np.ndarray
    covariances: np.ndarray
    n_eff: np.ndarray
    total_n_eff: float
    log_density: float = math.nan
    covariance: str = "full"

    @property
    def n_features(self) -> int:
        return int(self.means.shape[1])

    @classmethod
    def from_mixture(cls, mixture: Mixture, log_density=None) -> "Baseline":
        """Snapshot every segment of ``mixture``.

        Parameters
        ----------
        mixture : Mixture
        log_density : float, optional
            Mean log-density per row of recent data under ``mixture`` (data units).
        """
        return cls(
            ids=np.array(mixture.ids, dtype=np.int64),
            weights=np.array(mixture.weights, dtype=np.float64),
            means=mixture.data_means(),
            covariances=mixture.data_covariance_matrices(),
            n_eff=mixture.weights * mixture.n_eff,
            total_n_eff=float(mixture.n_eff),
            log_density=math.nan if log_density is None else float(log_density),
            covariance=mixture.covariance,
        )

    def index_of(self, segment_id) -> int:
        """Position of a segment id in the baseline (a clear error if it has none)."""
        return segment_index(self.ids, segment_id, "the baseline")

    def adopt(self, mixture: Mixture, ids) -> "Baseline":
        """A copy in which the given segments take their present state as baseline.

        For a segment born after the snapshot, once it has settled. Other segments
        keep their baseline; ``total_n_eff`` and ``log_density`` are unchanged.
        """
        fresh = Baseline.from_mixture(mixture)
        keep = self.without(ids)
        take = np.array([fresh.index_of(i) for i in ids], dtype=np.int64)
        return replace(
            keep,
            ids=np.concatenate([keep.ids, fresh.ids[take]]),
            weights=np.concatenate([keep.weights, fresh.weights[take]]),
            means=np.concatenate([keep.means, fresh.means[take]]),
            covariances=np.concatenate([keep.covariances, fresh.covariances[take]]),
            n_eff=np.concatenate([keep.n_eff, fresh.n_eff[take]]),
        )

    def without(self, ids) -> "Baseline":
        """A copy without the given segments (for example retired ones)."""
        keep = ~np.isin(self.ids, np.asarray(list(ids), dtype=np.int64))
        return replace(
            self, ids=self.ids[keep], weights=self.weights[keep], means=self.means[keep],
            covariances=self.covariances[keep], n_eff=self.n_eff[keep],
        )

    def to_dict(self) -> dict:
        """Plain lists and numbers (``inf`` and ``nan`` stored as ``None``)."""

        def num(x):
            return float(x) if math.isfinite(x) else None

        return {
            "format": STATE_FORMAT,
            "ids": [int(i) for i in self.ids],
            "weights": self.weights.tolist(),
            "means": self.means.tolist(),
            "covariances": self.covariances.tolist(),
            "n_eff": [num(n) for n in self.n_eff],
            "total_n_eff": num(self.total_n_eff),
            "log_density": num(self.log_density),
            "covariance": self.covariance,
        }

    @classmethod
    def from_dict(cls, data: Mapping) -> "Baseline":
        """Rebuild a baseline saved by :meth:`to_dict`."""
        if data.get("format") != STATE_FORMAT:
            raise ModelError(
                f"baseline has format {data.get('format')!r}; this shoal reads {STATE_FORMAT}"
            )
        missing = [k for k in ("ids", "weights", "means", "covariances", "n_eff",
                               "total_n_eff", "log_density", "covariance") if k not in data]
        if missing:
            raise ModelError(f"baseline lacks {missing}")
        n_features = len(data["means"][0]) if data["means"] else 0
        return cls(
            ids=np.array(data["ids"], dtype=np.int64),
            weights=np.array(data["weights"], dtype=np.float64),
            means=np.array(data["means"], dtype=np.float64).reshape(-1, n_features),
            covariances=np.array(data["covariances"], dtype=np.float64).reshape(
                -1, n_features, n_features
            ),
            n_eff=np.array([math.inf if n is None else n for n in data["n_eff"]], np.float64),
            total_n_eff=math.inf if data["total_n_eff"] is None else float(data["total_n_eff"]),
            log_density=math.nan if data["log_density"] is None else float(data["log_density"]),
            covariance=str(data["covariance"]),
        )


# ------------------------------------------------------------------------ noise levels


def _per_estimate(n_eff, variance, min_n):
    """``variance(n)`` where ``n > min_n``; ``inf`` at or below it; 0 for exact (``inf``) n."""
    n = np.asarray(n_eff, dtype=np.float64)
    exact = np.isposinf(n)
    usable = (n > min_n) & ~exact
    if usable.all():   # the usual case, once per drift window: no masking needed
        return variance(n)
    safe = np.where(usable, n, min_n + 1.0)
    return np.where(usable, variance(safe), np.where(exact, 0.0, np.inf))


def _combined(n_eff, ref_n_eff, variance, min_n):
    total = _per_estimate(n_eff, variance, min_n) + _per_estimate(ref_n_eff, variance, min_n)
    out = np.sqrt(total)
    return float(out) if out.ndim == 0 else out


def _trigamma(x):
    """``polygamma(1, x)`` as the Hurwitz zeta ``zeta(2, x)``, which scipy's polygamma
    computes it from (times ``(-1)**2 * gamma(2) = 1``: the same values) with less
    overhead (it is called once per drift window)."""
    return special.zeta(2.0, x)


def _full_log_gv_variance(n, n_features):
    i = np.arange(1, n_features + 1)
    return np.sum(_trigamma((n[..., None] - i) / 2.0), axis=-1)


def _diag_log_gv_variance(n, n_features):
    return n_features * _trigamma((n - 1.0) / 2.0)


def _spherical_log_gv_variance(n, n_features):
    return n_features**2 * _trigamma(n_features * (n - 1.0) / 2.0)


# variance of log|S| from n rows, and the fewest rows that give a finite one
_LOG_GV_VARIANCE = {
    "full": (_full_log_gv_variance, lambda d: float(d)),
    "diag": (_diag_log_gv_variance, lambda d: 1.0),
    "spherical": (_spherical_log_gv_variance, lambda d: 1.0),
}

_COVARIANCE_PARAMETERS = {
    "full": lambda d: d * (d + 1) // 2,
    "diag": lambda d: d,
    "spherical": lambda d: 1,
}


def _check_covariance_type(covariance):
    if covariance not in _LOG_GV_VARIANCE:
        raise ModelError(
            f"covariance should be one of {sorted(_LOG_GV_VARIANCE)}, got {covariance!r}"
        )


def mean_shift_noise(n_eff, n_features, ref_n_eff=math.inf):
    """RMS mean shift (baseline sds) from estimation noise alone: ``sqrt(D / n)``.

    Parameters
    ----------
    n_eff : float or array_like
        Effective rows behind the current mean.
    n_features : int
    ref_n_eff : float or array_like, default inf
        Effective rows behind the baseline mean (``inf``: the baseline is exact).

    Returns
    -------
    noise : float or ndarray
        ``sqrt(D / n_eff + D / ref_n_eff)``; ``inf`` where ``n_eff <= 0``.
    """
    return _combined(n_eff, ref_n_eff, lambda n: n_features / n, 0.0)


def spread_noise(n_eff, n_features, covariance="full", ref_n_eff=math.inf):
    """Standard deviation of ``log |S|`` estimated from ``n_eff`` Gaussian rows.

    ``sum_{i=1..D} psi1((n - i) / 2)`` (full), ``D psi1((n - 1) / 2)`` (diag),
    ``D^2 psi1(D (n - 1) / 2)`` (spherical), each about ``2 D / n``; the baseline's
    variance is added. ``inf`` when there are too few rows for a covariance
    (``n <= D`` full, ``n <= 1`` otherwise).
    """
    _check_covariance_type(covariance)
    variance, min_rows = _LOG_GV_VARIANCE[covariance]
    return _combined(n_eff, ref_n_eff, lambda n: variance(n, n_features), min_rows(n_features))


def hellinger_noise(n_eff, n_features, covariance="full", ref_n_eff=math.inf):
    """RMS Hellinger distance of an estimated Gaussian from the truth: ``sqrt((D + q) / (8 n))``.

    ``q`` is the number of covariance parameters (``D (D + 1) / 2`` full, ``D`` diag,
    ``1`` spherical). Capped at 1, the largest Hellinger distance.
    """
    _check_covariance_type(covariance)
    size = n_features + _COVARIANCE_PARAMETERS[covariance](n_features)
    noise = _combined(n_eff, ref_n_eff, lambda n: size / (8.0 * n), 0.0)
    return float(min(noise, 1.0)) if np.ndim(noise) == 0 else np.minimum(noise, 1.0)


def weight_noise(weight, total_n_eff, ref_total_n_eff=math.inf):
    """Standard deviation of a segment's weight: ``sqrt(w (1 - w) / N)`` (binomial share).

    Parameters
    ----------
    weight : float or array_like
        The weight under "no change" (the baseline weight).
    total_n_eff : float
        Effective rows behind the current weights (for a batch, its row count).
    ref_total_n_eff : float, default inf
        Effective rows behind the baseline weights.
    """
    share = np.asarray(weight, dtype=np.float64)
    spread = share * (1.0 - share)
    return _combined(total_n_eff, ref_total_n_eff, lambda n: spread / n, 0.0)


def fit_noise(log_density) -> float:
    """Standard error of a batch's mean log-density: ``sd / sqrt(n_rows)`` (``inf`` below 2 rows).

    Parameters
    ----------
    log_density : array_like of shape (n_samples,)
    """
    values = np.asarray(log_density, dtype=np.float64)
    if values.size < 2:
        return math.inf
    return float(np.std(values, ddof=1) / math.sqrt(values.size))


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
        """``(values, noise)`` keyed by ``(segment, statistic)`` for :func:`evaluate_bounds`."""
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
    """How much worse a batch fits than the baseline level (nats per row)."""

    value: float
    noise: float
    n_rows: int

    def bound_inputs(self) -> tuple[dict, dict]:
        """``(values, noise)`` keyed ``(WHOLE_MODEL, "fit_drop")`` for :func:`evaluate_bounds`."""
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
    """
    if not math.isfinite(baseline.log_density):
        raise ModelError("the baseline has no log-density level; take it with log_density=")
    values = np.asarray(log_density, dtype=np.float64).ravel()
    if not np.all(np.isfinite(values)):
        raise ModelError("log_density should be finite")
    value = baseline.log_density - float(np.mean(values)) if values.size else math.nan
    return FitDrop(value=value, noise=fit_noise(values), n_rows=int(values.size))


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


# ------------------------------------------------------------------------------- bounds


def _segment_order(segment):
    return (0, int(segment), "") if isinstance(segment, (int, np.integer)) else (1, 0, str(segment))


def _fresh_entry():
    return {"status": "ok", "above": 0, "below": 0, "first_at": None, "raised_at": None,
            "peak": None}


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
    for segment, statistic in sorted(values, key=lambda k: (_segment_order(k[0]), str(k[1]))):
        value = float(values[(segment, statistic)])
        bound = bounds.get((segment, statistic), bounds.get(statistic))
        if bound is None or not math.isfinite(value):
            continue
        bound = float(bound)
        level = float(noise.get((segment, statistic), 0.0))
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
