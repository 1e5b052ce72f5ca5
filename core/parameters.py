"""Parameters from sufficient statistics, and new mixtures that carry them.

A mixture keeps per component the running statistics ``s0`` (mass), ``s1`` (mass-
weighted mean) and ``s2`` (mass-weighted second moment) in standardised units; its
parameters (weights, means, covariances, precision Cholesky factors and their
log-determinants) are derived from them at every refresh point. The compiled kernels
derive the same parameters in one call (:func:`shoal.core.fused.derive`).
"""

from __future__ import annotations

import numpy as np

from . import fused

__all__ = ["TINY", "PARAMETERS", "derive", "refresh", "evolve"]

TINY = 10.0 * np.finfo(np.float64).eps   # added to s0: an empty component divides safely
PARAMETERS = frozenset({"weights", "means", "covariances", "prec_chol", "log_det"})
_OPERATORS = ("scoring_operator", "packed_operator")   # cached per parameter set


def derive(mixture, s0, s1, s2, sumsq) -> dict:
    """Parameters from statistics (standardised units).

    Parameters
    ----------
    mixture : Mixture
        Gives the covariance type, ``reg_covar`` and ``prior_weight``.
    s0 : ndarray of shape (n_components,)
    s1 : ndarray of shape (n_components, n_features)
    s2 : ndarray of shape (n_components, n_features, n_features), (n_components,
        n_features) or (n_components,), as the covariance type keeps it
    sumsq : float
        Sum of squared row weights (``1 / n_eff``).

    Returns
    -------
    params : dict
        ``weights`` (n_components,), ``means`` (n_components, n_features),
        ``covariances`` (the covariance type's shape), ``prec_chol`` and ``log_det``
        (n_components,): keyword arguments for :func:`evolve`.
    """
    if fused.enabled():
        return fused.derive(mixture, s0, s1, s2, sumsq, TINY)
    family = mixture.family
    s0_safe = s0 + TINY
    cov = family.covariance(s0_safe, s1, s2, 1.0 / sumsq, mixture.reg_covar,
                            mixture.prior_weight)
    weights = s0_safe / s0_safe.sum()
    prec_chol = family.precision_cholesky(cov)
    return dict(
        weights=weights,
        means=s1 / s0_safe[:, None],
        covariances=cov,
        prec_chol=prec_chol,
        log_det=family.log_det(prec_chol, mixture.n_features),
    )


def refresh(mixture, s0, s1, s2, sumsq) -> dict:
    """New parameters at a refresh point, with Polyak-Ruppert averaging if enabled.

    With averaging, the running mean of the statistics taken at every refresh point
    since warm-up gives the parameters (Cappé & Moulines 2009, section 3: averaging
    the iterates of a slowly decreasing step recovers the efficiency of the
    maximum-likelihood estimate); the stepwise recursion itself goes on unchanged.

    Parameters
    ----------
    mixture : Mixture
    s0, s1, s2 : ndarray
        The statistics at the refresh point, shapes as in :func:`derive`.
    sumsq : float

    Returns
    -------
    changes : dict
        The parameters of :func:`derive`, and with averaging the new ``avg_s0``,
        ``avg_s1``, ``avg_s2`` and ``avg_count``.
    """
    if not mixture.averaging:
        return derive(mixture, s0, s1, s2, sumsq)
    count = mixture.avg_count + 1
    share = 1.0 / count
    avg0 = mixture.avg_s0 + share * (s0 - mixture.avg_s0)
    avg1 = mixture.avg_s1 + share * (s1 - mixture.avg_s1)
    avg2 = mixture.avg_s2 + share * (s2 - mixture.avg_s2)
    out = derive(mixture, avg0, avg1, avg2, sumsq)
    out.update(avg_s0=avg0, avg_s1=avg1, avg_s2=avg2, avg_count=count)
    return out


def evolve(mixture, **changes):
    """A copy of ``mixture`` with ``changes``, without re-running its ``__init__``.

    ``dataclasses.replace`` at a tenth of the cost, which matters at every refresh. The
    cached scoring operators are dropped when the parameters change and kept otherwise.

    Parameters
    ----------
    mixture : Mixture
    **changes
        New values of the mixture's fields.

    Returns
    -------
    mixture : Mixture
    """
    new = object.__new__(type(mixture))
    state = dict(mixture.__dict__)
    if PARAMETERS.intersection(changes):
        for name in _OPERATORS:
            state.pop(name, None)
    state.update(changes)
    new.__dict__.update(state)
    return new
