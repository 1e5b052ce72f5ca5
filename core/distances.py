"""Closed-form distances between Gaussians and the drift test statistics built on them.

Every function takes means of shape ``(..., n_features)`` and covariances of shape
``(..., n_features, n_features)``; leading (batch) dimensions broadcast against each
other, so one call compares every segment with its reference. Covariances must be
symmetric positive definite; they are factorised with Cholesky, never inverted, and
log-determinants come from the factor's diagonal.

Formulas (``d`` features, ``dm = m1 - m0``):

* Bhattacharyya, with ``S = (S0 + S1) / 2``:
  ``D_B = dm' S^-1 dm / 8 + 0.5 log(|S| / sqrt(|S0| |S1|))``; coefficient
  ``BC = exp(-D_B)``; Hellinger ``H = sqrt(1 - BC)`` (so ``0 <= H <= 1``).
* Mahalanobis distance of a mean under a reference covariance
  (:class:`GaussianSet`), and Hotelling's ``T^2 = n_eff * dm' S^-1 dm`` with Kish's
  effective sample size ``n_eff = (sum w)^2 / sum w^2``, whose upper tail
  :func:`hotelling_t2_pvalue` gives.
* Log-determinants ``log |S|`` (:class:`GaussianSet`), for log generalised variance
  ratios ``log |S1| - log |S0|``.
"""

from __future__ import annotations

import functools

import numpy as np
from scipy import linalg, special

from .errors import IllConditionedError, ModelError

__all__ = [
    "bhattacharyya_distance",
    "GaussianSet",
    "hellinger_distance",
    "hellinger_from_bhattacharyya",
    "pairwise_bhattacharyya",
    "bhattacharyya_lower_bound",
    "hotelling_t2_pvalue",
    "pair_indices",
]


# --------------------------------------------------------------------------- checks


def _as_means(mean, name):
    mean = np.asarray(mean, dtype=np.float64)
    if mean.ndim < 1:
        raise ModelError(f"{name} should have shape (..., n_features), got a scalar")
    if not np.all(np.isfinite(mean)):
        raise ModelError(f"{name} should be finite, got NaN or infinity")
    return mean


def _as_covs(cov, name, n_features):
    cov = np.asarray(cov, dtype=np.float64)
    if cov.ndim < 2 or cov.shape[-2:] != (n_features, n_features):
        raise ModelError(
            f"{name} should have shape (..., {n_features}, {n_features}), got {cov.shape}"
        )
    if not np.all(np.isfinite(cov)):
        raise ModelError(f"{name} should be finite, got NaN or infinity")
    if not np.allclose(cov, np.swapaxes(cov, -1, -2), rtol=1e-8, atol=1e-12):
        raise ModelError(f"{name} should be symmetric")
    return 0.5 * (cov + np.swapaxes(cov, -1, -2))


def _check_pair(mean0, cov0, mean1, cov1, names=("mean0", "cov0", "mean1", "cov1")):
    """Validate two Gaussians and broadcast them to one batch shape."""
    mean0 = _as_means(mean0, names[0])
    mean1 = _as_means(mean1, names[2])
    n_features = mean0.shape[-1]
    if mean1.shape[-1] != n_features:
        raise ModelError(
            f"{names[2]} should have {n_features} features like {names[0]}, "
            f"got shape {mean1.shape}"
        )
    cov0 = _as_covs(cov0, names[1], n_features)
    cov1 = _as_covs(cov1, names[3], n_features)
    try:
        batch = np.broadcast_shapes(
            mean0.shape[:-1], cov0.shape[:-2], mean1.shape[:-1], cov1.shape[:-2]
        )
    except ValueError as exc:
        raise ModelError(
            f"batch shapes do not broadcast: {names[0]} {mean0.shape}, {names[1]} "
            f"{cov0.shape}, {names[2]} {mean1.shape}, {names[3]} {cov1.shape}"
        ) from exc
    vec, mat = batch + (n_features,), batch + (n_features, n_features)
    return (
        np.broadcast_to(mean0, vec),
        np.broadcast_to(cov0, mat),
        np.broadcast_to(mean1, vec),
        np.broadcast_to(cov1, mat),
    )


# --------------------------------------------------------------------------- kernels


def _cholesky(cov, name):
    """Lower Cholesky factors of a stack of covariances, shape (..., D, D)."""
    try:
        return np.linalg.cholesky(cov)
    except np.linalg.LinAlgError as exc:
        raise IllConditionedError(
            f"{name} is not positive definite; add a small value (reg_covar) to its "
            "diagonal, or drop features that are constant or copies of others"
        ) from exc


def _solve_lower(chol, rhs):
    """``chol^-1 rhs`` for lower-triangular ``chol`` (..., D, D), ``rhs`` (..., D, m).

    A stack is solved by forward substitution over its D rows, each step one
    vectorised product over the whole stack: a LAPACK call per matrix pays its call
    overhead once per matrix, which dominates for the small stacks of the drift and
    lifecycle checks (K(K-1)/2 pairs of D x D factors).
    """
    if chol.ndim == 2 and rhs.ndim == 2:
        return linalg.solve_triangular(chol, rhs, lower=True, check_finite=False)
    batch = np.broadcast_shapes(chol.shape[:-2], rhs.shape[:-2])
    chol = np.broadcast_to(chol, batch + chol.shape[-2:])
    rhs = np.broadcast_to(rhs, batch + rhs.shape[-2:])
    out = np.empty(batch + rhs.shape[-2:])
    diag = np.diagonal(chol, axis1=-2, axis2=-1)[..., None]
    for i in range(rhs.shape[-2]):
        known = np.matmul(chol[..., i:i + 1, :i], out[..., :i, :])[..., 0, :]
        out[..., i, :] = (rhs[..., i, :] - known) / diag[..., i, :]
    return out


@functools.lru_cache(maxsize=64)
def pair_indices(n: int) -> tuple[np.ndarray, np.ndarray]:
    """The unordered pairs of ``n`` Gaussians, in the order the pairwise functions use.

    ``np.triu_indices(n, k=1)``, made once per ``n`` and kept read-only: numpy builds
    them from an (n, n) mask on every call, and the lifecycle asks at every decision
    point.

    Parameters
    ----------
    n : int
        The number of Gaussians.

    Returns
    -------
    rows, cols : ndarray of shape (n (n - 1) / 2,), int
        The first and second member of each pair, ``rows < cols``.
    """
    rows, cols = np.triu_indices(n, k=1)
    rows.setflags(write=False)
    cols.setflags(write=False)
    return rows, cols


def _log_det_chol(chol):
    """``log |S|`` from the Cholesky factor of ``S``, shape (...)."""
    return 2.0 * np.sum(np.log(np.diagonal(chol, axis1=-2, axis2=-1)), axis=-1)


def _squared_mahalanobis_chol(diff, chol):
    """``diff' S^-1 diff`` with ``S = chol chol'``; diff (..., D) -> (...)."""
    white = _solve_lower(chol, diff[..., None])[..., 0]
    return np.sum(white * white, axis=-1)


def _scalar_or_array(value):
    return float(value) if np.ndim(value) == 0 else value


# --------------------------------------------------------------------------- public


def _bhattacharyya(mean0, cov0, mean1, cov1):
    chol0 = _cholesky(cov0, "cov0")
    chol1 = _cholesky(cov1, "cov1")
    chol = _cholesky(0.5 * (cov0 + cov1), "(cov0 + cov1) / 2")
    maha = _squared_mahalanobis_chol(mean1 - mean0, chol)
    log_ratio = _log_det_chol(chol) - 0.5 * (_log_det_chol(chol0) + _log_det_chol(chol1))
    return np.maximum(0.125 * maha + 0.5 * log_ratio, 0.0)


def bhattacharyya_distance(mean0, cov0, mean1, cov1):
    """Bhattacharyya distance ``D_B = -log BC`` between two Gaussians.

    Parameters
    ----------
    mean0, mean1 : array_like of shape (..., n_features)
    cov0, cov1 : array_like of shape (..., n_features, n_features)
        Symmetric positive definite. Leading dimensions broadcast.

    Returns
    -------
    distance : float or ndarray of shape (...)
        Symmetric, non-negative, zero only for identical Gaussians.
    """
    return _scalar_or_array(_bhattacharyya(*_check_pair(mean0, cov0, mean1, cov1)))


def pairwise_bhattacharyya(means, covs, pairs=None):
    """Bhattacharyya distances between every pair of a set of Gaussians.

    Each Gaussian's own factorisation is done once and each unordered pair once, so
    ``K`` Gaussians cost ``K + K(K-1)/2`` Cholesky factorisations rather than the
    ``3 K^2`` of broadcasting :func:`bhattacharyya_distance` over all ordered pairs.

    Parameters
    ----------
    means : array_like of shape (K, n_features)
    covs : array_like of shape (K, n_features, n_features)
    pairs : ndarray of bool, shape (K(K-1)/2,), optional
        Which pairs of ``np.triu_indices(K, k=1)`` to compute; the others are left
        at ``inf`` (each pair's value does not depend on which others are computed).

    Returns
    -------
    distances : ndarray of shape (K, K)
        Symmetric, zero on the diagonal.
    """
    means = np.asarray(means, dtype=np.float64)
    covs = np.asarray(covs, dtype=np.float64)
    n = means.shape[0]
    out = np.zeros((n, n))
    if n < 2:
        return out
    rows, cols = pair_indices(n)
    if pairs is not None:
        out[rows[~pairs], cols[~pairs]] = out[cols[~pairs], rows[~pairs]] = np.inf
        rows, cols = rows[pairs], cols[pairs]
        if rows.size == 0:
            return out
    own = _log_det_chol(_cholesky(covs, "covs"))
    chol = _cholesky(0.5 * (covs[rows] + covs[cols]), "(cov0 + cov1) / 2")
    maha = _squared_mahalanobis_chol(means[cols] - means[rows], chol)
    log_ratio = _log_det_chol(chol) - 0.5 * (own[rows] + own[cols])
    out[rows, cols] = np.maximum(0.125 * maha + 0.5 * log_ratio, 0.0)
    out[cols, rows] = out[rows, cols]
    return out


def bhattacharyya_lower_bound(means, covs):
    """A lower bound of the Bhattacharyya distance of every pair, from means and traces.

    ``D_B >= (1/8) d' S^-1 d`` with ``S = (S0 + S1) / 2`` (its log-determinant term is
    never negative: log det is concave), and ``d' S^-1 d >= |d|^2 / lambda_max(S) >=
    |d|^2 / tr(S)``, so ``D_B >= |d|^2 / (4 (tr S0 + tr S1))``: no factorisation needed.

    Parameters
    ----------
    means : array_like of shape (K, n_features)
    covs : array_like of shape (K, n_features, n_features)

    Returns
    -------
    bound : ndarray of shape (K(K-1)/2,)
        For the pairs of ``np.triu_indices(K, k=1)``.
    """
    means = np.asarray(means, dtype=np.float64)
    covs = np.asarray(covs, dtype=np.float64)
    rows, cols = pair_indices(means.shape[0])
    trace = np.trace(covs, axis1=-2, axis2=-1)
    gap = np.sum((means[rows] - means[cols]) ** 2, axis=-1)
    return gap / (4.0 * (trace[rows] + trace[cols]))


def hellinger_distance(mean0, cov0, mean1, cov1):
    """Hellinger distance ``H = sqrt(1 - BC)`` between two Gaussians, in [0, 1].

    ``1 - BC`` is computed as ``-expm1(-D_B)`` so that small distances keep their
    precision.

    Parameters
    ----------
    mean0, mean1 : array_like of shape (..., n_features)
        The two Gaussians' means; leading dimensions broadcast.
    cov0, cov1 : array_like of shape (..., n_features, n_features)
        Their covariances, symmetric positive definite.

    Returns
    -------
    hellinger : float or ndarray of shape (...)
        Symmetric; 0 for identical Gaussians, 1 for Gaussians that do not overlap.
    """
    distance = _bhattacharyya(*_check_pair(mean0, cov0, mean1, cov1))
    return _scalar_or_array(hellinger_from_bhattacharyya(distance))


def hellinger_from_bhattacharyya(distance):
    """Hellinger distances from Bhattacharyya distances, ``H = sqrt(1 - exp(-D_B))``.

    Parameters
    ----------
    distance : float or array_like of shape (...)
        Bhattacharyya distances, non-negative (``inf`` gives 1).

    Returns
    -------
    hellinger : ndarray of shape (...)
        In [0, 1]; ``1 - exp(-D_B)`` as ``-expm1(-D_B)`` so that small distances keep
        their precision.
    """
    return np.sqrt(-np.expm1(-np.asarray(distance, dtype=np.float64)))


class GaussianSet:
    """A fixed set of Gaussians, factorised once, to compare many others against.

    ``mahalanobis`` measures means against member ``index`` and ``log_det`` holds each
    member's log-determinant, without re-validating and re-factorising the set on
    every call (a drift baseline is compared with every window of the stream).

    Parameters
    ----------
    means : array_like of shape (K, n_features)
    covs : array_like of shape (K, n_features, n_features)
        Symmetric positive definite.

    Attributes
    ----------
    means : ndarray of shape (K, n_features)
    log_det : ndarray of shape (K,)
        ``log |S_i|`` of each member.
    inv_chol : ndarray of shape (K, n_features, n_features)
        ``L_i^-1`` of each member's lower Cholesky factor ``S_i = L_i L_i'``.
    """

    def __init__(self, means, covs):
        self.means = _as_means(means, "means")
        if self.means.ndim != 2:
            raise ModelError(f"means should have shape (K, n_features), got {self.means.shape}")
        n, d = self.means.shape
        covs = _as_covs(covs, "covs", d)
        if covs.shape != (n, d, d):
            raise ModelError(f"covs should have shape ({n}, {d}, {d}), got {covs.shape}")
        chol = _cholesky(covs, "covs")
        self.log_det = _log_det_chol(chol)
        # L^-1 once, so that every later comparison whitens with one batched product
        self.inv_chol = _solve_lower(chol, np.broadcast_to(np.eye(d), (n, d, d)))

    def mahalanobis(self, means, index) -> np.ndarray:
        """Mahalanobis distance of each mean from a member, under that member's covariance.

        Parameters
        ----------
        means : array_like of shape (n, n_features)
        index : ndarray of shape (n,), int
            The member each mean is compared with.

        Returns
        -------
        distance : ndarray of shape (n,)
            ``sqrt((m - mu_i)' S_i^-1 (m - mu_i))``.
        """
        diff = np.asarray(means, dtype=np.float64) - self.means[index]
        white = np.einsum("nij,nj->ni", self.inv_chol[index], diff)
        return np.sqrt(np.einsum("ni,ni->n", white, white))

def hotelling_t2_pvalue(t2, n_features):
    """Upper-tail p-value of a Hotelling ``T^2`` statistic against a known covariance.

    For a weighted batch mean ``sum w x / sum w`` of independent rows with covariance
    ``ref_cov``, the mean's covariance is ``ref_cov / n_eff`` with Kish's ``n_eff``
    (``(sum w)^2 / sum w^2``), so under "no change"
    ``T^2 = n_eff (mean - ref_mean)' ref_cov^-1 (mean - ref_mean)`` follows a
    chi-square distribution with ``n_features`` degrees of freedom. The reference
    covariance counts as known: a baseline is fitted on far more rows than a batch
    holds.

    Parameters
    ----------
    t2 : float or array_like of shape (...)
    n_features : int

    Returns
    -------
    p_value : float or ndarray of shape (...)
    """
    if int(n_features) != n_features or n_features < 1:
        raise ModelError(f"n_features should be a positive integer, got {n_features!r}")
    return _scalar_or_array(special.chdtrc(n_features, np.asarray(t2, dtype=np.float64)))
