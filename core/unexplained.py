"""Rows that no segment explains: squared Mahalanobis distances and chi-square bounds.

A row a component generated has a squared Mahalanobis distance to it distributed as
chi-square with ``n_features`` degrees of freedom; a row beyond the ``threshold``
quantile of every component is unexplained. The pool of such rows is where new
segments are born from.
"""
from __future__ import annotations

import functools
import math

import numpy as np
from scipy import special

from .errors import ModelError
from .mixture import Mixture

__all__ = ["chi2_quantile", "squared_mahalanobis", "unexplained", "unexplained_below",
           "unexplained_scored"]

_LOG_2PI = float(np.log(2.0 * np.pi))


@functools.lru_cache(maxsize=64)
def _chi2_quantile(probability: float, dof: int) -> float:
    return float(2.0 * special.gammaincinv(0.5 * dof, probability))


def chi2_quantile(probability, dof) -> float:
    """The chi-square(``dof``) quantile at ``probability``.

    As ``scipy.stats.chi2.ppf``, which computes ``2 gammaincinv(dof / 2, p)``; cached,
    and without importing scipy.stats, which costs seconds at start-up.

    Parameters
    ----------
    probability : float in (0, 1)
    dof : int

    Returns
    -------
    float
    """
    return _chi2_quantile(float(probability), int(dof))


def _probability(threshold) -> float:
    threshold = float(threshold)
    if not 0.0 < threshold < 1.0:
        raise ModelError(f"threshold should be a probability in (0, 1), got {threshold!r}")
    return threshold


def squared_mahalanobis(mixture: Mixture, X) -> np.ndarray:
    """Squared Mahalanobis distance of every row to every component.

    Parameters
    ----------
    mixture : Mixture
        The model whose components are measured.
    X : array_like of shape (n_samples, n_features)
        Finite rows in the data's own units.

    Returns
    -------
    d2 : ndarray of shape (n_samples, n_components)
        ``(x - mu_k)' Sigma_k^-1 (x - mu_k)``; the same in data and standardised units.
    """
    # log N(z | k) = -0.5 (D log 2 pi + d2) + log det U_k, and data-unit densities
    # differ from standardised ones by -sum(log scale).
    log_gauss = mixture.component_log_density(X) + np.sum(np.log(mixture.scale))
    d2 = -2.0 * (log_gauss - mixture.log_det) - mixture.n_features * _LOG_2PI
    return np.maximum(d2, 0.0)


def unexplained(mixture: Mixture, X, threshold: float = 0.999) -> np.ndarray:
    """Rows that no segment explains: too far from every component.

    A row is unexplained when its squared Mahalanobis distance to every component
    exceeds the ``threshold`` quantile of the chi-square distribution with
    ``n_features`` degrees of freedom (the distribution of that distance for a row
    the component did generate), from :func:`chi2_quantile`.

    Parameters
    ----------
    mixture : Mixture
    X : array_like of shape (n_samples, n_features)
    threshold : float in (0, 1), default 0.999
        With it, a row of a segment is unexplained by that segment with probability
        ``1 - threshold``.

    Returns
    -------
    mask : ndarray of bool, shape (n_samples,)
    """
    bound = chi2_quantile(_probability(threshold), mixture.n_features)
    return np.all(squared_mahalanobis(mixture, X) > bound, axis=1)


def _joint_bounds(mixture: Mixture, threshold: float) -> np.ndarray:
    """Per component, ``log w_k + log N(x | k)`` of a row at squared Mahalanobis distance
    ``b`` (the chi-square quantile) from it, in the data's units: a row is beyond ``b``
    from component ``k`` exactly when its ``log w_k + log N(x | k)`` is below this."""
    shift = _half_bound(_probability(threshold), mixture.n_features) + _log_scale_sum(mixture)
    return np.log(mixture.weights) + (mixture.log_det - shift)


def unexplained_below(mixture: Mixture, threshold: float = 0.999) -> float:
    """A log-density above which no row can be unexplained (a cheap first filter).

    A row that every component leaves unexplained has ``d2_k > b`` for all ``k``
    (``b`` the chi-square quantile), so its log-density under the mixture is below
    ``logsumexp_k(log w_k - (D log 2 pi + b) / 2 + log det U_k) - sum(log scale)``.
    Only rows under this bound need the exact test of :func:`unexplained`.

    Parameters
    ----------
    mixture : Mixture
    threshold : float in (0, 1), default 0.999

    Returns
    -------
    bound : float
        In the data's own units, as ``Scores.log_density``.
    """
    shift = _half_bound(_probability(threshold), mixture.n_features) + _log_scale_sum(mixture)
    # log sum_k exp(log w_k + log det U_k) in Python floats (a handful of components:
    # quicker than numpy calls), about the largest term so that nothing overflows
    terms = [math.log(w) + d if w > 0.0 else -math.inf
             for w, d in zip(mixture.weights.tolist(), mixture.log_det.tolist())]
    top = max(terms)
    if top == -math.inf:
        return top
    return top + math.log(sum([math.exp(t - top) for t in terms])) - shift


def _log_scale_sum(mixture: Mixture) -> float:
    """``mixture.log_scale_sum``, remembered for the scale last asked about: the scale
    is frozen at warm-up (every model of a stream shares its array), and the lifecycle
    asks at every piece."""
    global _scale_sum
    scale, value = _scale_sum
    if mixture.scale is not scale:
        scale, value = mixture.scale, float(np.sum(np.log(mixture.scale)))
        _scale_sum = (scale, value)
    return value


_scale_sum: tuple = (None, 0.0)


@functools.lru_cache(maxsize=64)
def _half_bound(threshold: float, n_features: int) -> float:
    """``(D log 2 pi + b) / 2``, ``b`` the chi-square quantile at ``threshold``."""
    return 0.5 * (n_features * _LOG_2PI + chi2_quantile(threshold, n_features))


def unexplained_scored(mixture: Mixture, resp, log_density, threshold: float = 0.999):
    """Rows no segment explains, from the scores ``mixture`` gave them.

    The test of :func:`unexplained` without scoring the rows again. Only rows under the
    bound of :func:`unexplained_below` can be unexplained; for them, the
    responsibilities and the log-density give each component's term,
    ``log w_k + log N(x | k) = log r_k + log p(x)``, and ``d2_k > b`` exactly when that
    term is below the one of a row at distance ``b``. A responsibility that underflowed
    to zero counts as beyond the bound (its component's term is some 745 nats under
    the row's density). Rows scored at log-density ``+inf`` (a marker for rows left
    out) are never unexplained.

    Parameters
    ----------
    mixture : Mixture
        The model that scored the rows.
    resp : ndarray of shape (n_samples, n_components)
        Their responsibilities under ``mixture``.
    log_density : ndarray of shape (n_samples,)
        Their log-densities under ``mixture``, data units (``Scores.log_density``).
    threshold : float in (0, 1), default 0.999

    Returns
    -------
    rows : ndarray of int
        The positions of the unexplained rows, ascending.
    """
    log_density = np.asarray(log_density)
    # the 1e-9 margin, far above rounding, keeps every unexplained row in the filter
    near = np.flatnonzero(log_density < unexplained_below(mixture, threshold) + 1e-9)
    if near.size == 0:
        return near
    with np.errstate(divide="ignore", invalid="ignore"):
        joint = np.log(resp[near]) + log_density[near, None]
    return near[(joint < _joint_bounds(mixture, threshold)).all(axis=1)]
