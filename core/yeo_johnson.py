"""The Yeo-Johnson power transform: forward, inverse, log-Jacobian, and its parameter.

Yeo & Johnson (2000), "A new family of power transformations to improve normality or
symmetry", Biometrika 87(4)::

    y = ((1 + x)^l - 1) / l              x >= 0, l != 0
    y = log(1 + x)                       x >= 0, l == 0
    y = -((1 - x)^(2 - l) - 1) / (2 - l) x < 0,  l != 2
    y = -log(1 - x)                      x < 0,  l == 2

for every finite ``x``, with log-Jacobian ``(l - 1) sign(x) log(1 + |x|)``. The branch
for negative ``x`` is the branch for positive ``x`` mirrored: ``T_l(x) = -T_{2-l}(-x)``,
so each direction is written once, for ``x >= 0``. The parameter ``l`` is fitted once by
maximum likelihood (:func:`fit_yeo_johnson`) and then kept.
"""

from __future__ import annotations

import numpy as np
from scipy import optimize

from .errors import ModelError

__all__ = [
    "yeo_johnson",
    "yeo_johnson_inverse",
    "yeo_johnson_log_jacobian",
    "yeo_johnson_log_likelihood",
    "fit_yeo_johnson",
]

# below this distance from 0 (or 2) the power branch is replaced by its limit, the log
_LIMIT = 1e-12


def _positive_branch(x, lmbda):
    """``((1 + x)^l - 1) / l`` for ``x >= 0``, by ``expm1``/``log1p`` (no loss near 0)."""
    if abs(lmbda) < _LIMIT:
        return np.log1p(x)
    return np.expm1(lmbda * np.log1p(x)) / lmbda


def _positive_branch_inverse(y, lmbda):
    """The ``x >= 0`` that :func:`_positive_branch` maps to ``y``; NaN out of range."""
    if abs(lmbda) < _LIMIT:
        return np.expm1(y)
    return np.expm1(np.log1p(lmbda * y) / lmbda)


def _mirrored(branch, values, lmbda):
    """``branch(v, lmbda)`` where ``v >= 0`` and ``-branch(-v, 2 - lmbda)`` elsewhere."""
    out = np.empty_like(values)
    pos = values >= 0
    out[pos] = branch(values[pos], lmbda)
    out[~pos] = -branch(-values[~pos], 2.0 - lmbda)
    return out


def yeo_johnson(x, lmbda: float) -> np.ndarray:
    """The Yeo-Johnson transform of ``x`` with parameter ``lmbda``.

    Parameters
    ----------
    x : ndarray of shape (n_samples,)
        Values in the data's units; any finite value.
    lmbda : float
        The power; 1 leaves ``x`` as it is.

    Returns
    -------
    y : ndarray of shape (n_samples,)
        By ``expm1``/``log1p``, so that ``lmbda`` near 0 or 2 loses no precision.
    """
    return _mirrored(_positive_branch, np.asarray(x, dtype=np.float64), lmbda)


def yeo_johnson_inverse(y, lmbda: float) -> np.ndarray:
    """``x`` such that ``yeo_johnson(x, lmbda) == y``.

    Parameters
    ----------
    y : ndarray of shape (n_samples,)
        Transformed values.
    lmbda : float
        The power the values were transformed with.

    Returns
    -------
    x : ndarray of shape (n_samples,)
        Not finite where ``y`` is outside the transform's range (for ``lmbda < 0``
        the range is ``y < -1 / lmbda``; for ``lmbda > 2``, ``y > -1 / (2 - lmbda)``).
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        return _mirrored(_positive_branch_inverse, np.asarray(y, dtype=np.float64), lmbda)


def yeo_johnson_log_jacobian(x, lmbda: float) -> np.ndarray:
    """``log |dy/dx|`` of the Yeo-Johnson transform, ``(lmbda - 1) sign(x) log1p(|x|)``.

    Parameters
    ----------
    x : ndarray of shape (n_samples,)
        Values in the data's units (before the transform).
    lmbda : float
        The power.

    Returns
    -------
    log_jacobian : ndarray of shape (n_samples,)
    """
    x = np.asarray(x, dtype=np.float64)
    return (lmbda - 1.0) * np.sign(x) * np.log1p(np.abs(x))


def yeo_johnson_log_likelihood(x, lmbda: float) -> float:
    """The profile log-likelihood of ``lmbda`` (Yeo & Johnson 2000, section 3).

    ``-n/2 log(sigma^2(lmbda)) + (lmbda - 1) sum sign(x) log1p(|x|)``, with ``sigma^2``
    the maximum-likelihood variance of the transformed values; the Gaussian's mean and
    variance are profiled out and constants dropped.

    Parameters
    ----------
    x : ndarray of shape (n_samples,)
        The sample the parameter is fitted to.
    lmbda : float
        The power whose likelihood is wanted.

    Returns
    -------
    log_likelihood : float
        ``-inf`` where the transformed values have no finite, positive variance.
    """
    x = np.asarray(x, dtype=np.float64)
    y = yeo_johnson(x, lmbda)
    var = np.mean((y - np.mean(y)) ** 2)
    if not np.isfinite(var) or var <= 0.0:
        return -np.inf
    return float(-0.5 * x.size * np.log(var) + np.sum(yeo_johnson_log_jacobian(x, lmbda)))


def fit_yeo_johnson(x) -> float:
    """The maximum-likelihood Yeo-Johnson parameter of ``x``.

    The profile log-likelihood (:func:`yeo_johnson_log_likelihood`) is maximised over
    the interval of ``lmbda`` in which values up to 20 times the largest ``|x|``
    transform without overflow or underflow in half the float exponent range (the
    bounds scipy's ``yeojohnson_normmax`` uses), to ``xtol`` 1.48e-8.

    Parameters
    ----------
    x : array_like of shape (n_samples,)
        Finite values, at least two distinct.

    Returns
    -------
    lmbda : float

    Raises
    ------
    ModelError
        When ``x`` has fewer than two distinct finite values.
    """
    x = np.asarray(x, dtype=np.float64).ravel()
    if x.size < 2 or not np.all(np.isfinite(x)) or np.ptp(x) == 0.0:
        raise ModelError("the Yeo-Johnson parameter needs at least two distinct finite values")
    log1p_max = np.log1p(20.0 * np.max(np.abs(x)))
    eps, info = np.finfo(np.float64).eps, np.finfo(np.float64)
    lo = (np.log(info.tiny) - np.log(eps)) / 2.0 / log1p_max
    hi = (np.log(info.max) + np.log(eps)) / 2.0 / log1p_max
    if np.all(x < 0):
        lo, hi = 2.0 - hi, 2.0 - lo
    elif np.any(x < 0):
        lo, hi = max(2.0 - hi, lo), min(2.0 - lo, hi)

    def negative(lmbda):
        value = yeo_johnson_log_likelihood(x, lmbda)
        return -value if np.isfinite(value) else np.inf

    return float(optimize.fminbound(negative, lo, hi, xtol=1.48e-8))
