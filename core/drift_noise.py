"""Noise levels of the drift statistics: the size each reaches from estimation noise alone.

Each statistic comes with the root-mean-square size it reaches from
estimation noise alone when nothing has changed, at the effective sample size of the
estimates. For Gaussian rows, an estimate from ``n`` effective rows in ``D``
features:

* mean shift: ``n d^2 ~ chi2(D)``, so ``rms = sqrt(D / n)``;
* spread change: ``n S ~ Wishart(n - 1, Sigma)`` gives
  ``var log|S| = sum_{i=1..D} psi1((n - i) / 2)`` (full; ``psi1`` the trigamma
  function), ``D psi1((n - 1) / 2)`` (diag, D independent chi-squares) and
  ``D^2 psi1(D (n - 1) / 2)`` (spherical, one pooled chi-square); all ``~ 2D / n``;
* weight: a share of ``N`` effective rows is binomial, ``sd = sqrt(w (1 - w) / N)``;
* fit: the standard error of a batch mean, ``sd(log-density) / sqrt(n_rows)``.

When the baseline is itself an estimate (from ``n_ref`` effective rows), the two
errors add: the variance is ``v(n) + v(n_ref)``. This is exact for independent
estimates and errs on the large (quiet) side when the two share rows. A segment's
effective rows in a mixture are taken as ``weight * n_eff`` of the mixture (Kish's
``n_eff = 1 / sum w_i^2`` over the rows' step weights); that is exact for hard
assignments that fall at random among the rows.
"""
from __future__ import annotations

import math

import numpy as np
from scipy import special

from .errors import ModelError

__all__ = ["mean_shift_noise", "spread_noise", "spread_variance", "weight_noise"]

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
    """``sum_{i=1}^{D} trigamma((n - i) / 2)``, by parity of ``i``: each half is
    ``sum_{m<L} trigamma(a - m) = L trigamma(a) + sum_{0<j<L} (L - j) / (a - j)^2``
    (from ``trigamma(x) = trigamma(x + 1) + 1 / x^2``), two special-function calls per
    estimate instead of D."""
    n = np.asarray(n, dtype=np.float64)
    total = np.zeros(n.shape)
    for a, L in (((n - 1.0) / 2.0, (n_features + 1) // 2), ((n - 2.0) / 2.0, n_features // 2)):
        if L:
            j = np.arange(1, L)
            total = total + L * _trigamma(a) + np.sum((L - j) / (a[..., None] - j) ** 2, axis=-1)
    return total


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

    Parameters
    ----------
    n_eff : float or array_like
        Effective rows behind the current estimate.
    n_features : int
    covariance : {"full", "diag", "spherical"}, default "full"
    ref_n_eff : float or array_like, default inf
        Effective rows behind the baseline (``inf``: exact).

    Returns
    -------
    noise : float or ndarray
        The standard deviation of ``log |S| - log |S_ref|``.
    """
    _check_covariance_type(covariance)
    variance, min_rows = _LOG_GV_VARIANCE[covariance]
    return _combined(n_eff, ref_n_eff, lambda n: variance(n, n_features), min_rows(n_features))


def spread_variance(n_eff, n_features, covariance="full"):
    """Variance of ``log |S|`` from one estimate's ``n_eff`` rows (the terms of
    :func:`spread_noise`, for a side that is compared many times, such as a baseline).

    Parameters
    ----------
    n_eff : float or array_like
    n_features : int
    covariance : {"full", "diag", "spherical"}, default "full"

    Returns
    -------
    variance : float or ndarray
        0 for an exact estimate (``inf`` rows), ``inf`` with too few rows for a
        covariance; ``spread_noise(n, D, c, n_ref) = sqrt(spread_variance(n) +
        spread_variance(n_ref))``.
    """
    _check_covariance_type(covariance)
    variance, min_rows = _LOG_GV_VARIANCE[covariance]
    return _per_estimate(n_eff, lambda n: variance(n, n_features), min_rows(n_features))


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

    Returns
    -------
    noise : float or ndarray
        ``sqrt(w (1 - w) (1 / N + 1 / N_ref))``.
    """
    share = np.asarray(weight, dtype=np.float64)
    spread = share * (1.0 - share)
    return _combined(total_n_eff, ref_total_n_eff, lambda n: spread / n, 0.0)
