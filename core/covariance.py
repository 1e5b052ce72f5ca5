"""One family of kernels per covariance type, all with the same signatures.

Everything here works in *standardised units* (the pivot and scale frozen at warm-up)
and does no validation: callers in :mod:`shoal.core.mixture` check their inputs once.

Each family provides

``second_moment(Z, resp_w, n_features)``
    The responsibility-weighted second moments ``sum_i r_ik z_i z_i^T`` (full), the
    diagonal of it (diag) or its trace divided by ``n_features`` (spherical).
``covariance(s0, s1, s2, n_eff, reg_covar, prior_weight)``
    Covariances from sufficient statistics, shrunk towards the identity by a weak
    conjugate (inverse-Wishart-like) prior worth ``prior_weight`` rows, plus
    ``reg_covar`` on the diagonal.
``precision_cholesky(cov)``
    Upper-triangular ``U`` with ``U U^T = cov^-1`` (full), or ``1/sqrt(var)``.
``log_det(prec_chol, n_features)``
    ``log det U``, i.e. ``-0.5 log det cov``, per component.
``log_gaussian(Z, means, prec_chol)``
    ``log N(z | mu_k, Sigma_k)`` for every row and component, via the precision
    Cholesky factor: ``-0.5 (D log 2 pi + ||(z - mu) U||^2) + log det U``.
``matrices(cov, n_features)``
    Full ``(K, D, D)`` matrices, for reporting and for the drift distances.
``n_parameters(n_components, n_features)``
    Free covariance parameters, for BIC.
"""

from __future__ import annotations

import numpy as np
from .errors import IllConditionedError

__all__ = ["FAMILIES", "COVARIANCE_TYPES", "LOG_2PI"]

LOG_2PI = float(np.log(2.0 * np.pi))

_REMEDY = (
    "raise reg_covar (for example to 1e-4), ask for fewer segments, "
    "or drop features that are constant or exact copies of others"
)


def _shrink(sample_cov, s0, n_eff, prior_weight, identity):
    """Blend the sample covariance with the identity, worth ``prior_weight`` rows."""
    if prior_weight <= 0.0:
        return sample_cov
    total = float(np.sum(s0))
    nk = s0 / total * n_eff if total > 0 else np.zeros_like(s0)
    share = nk / (nk + prior_weight)
    shape = (-1,) + (1,) * (sample_cov.ndim - 1)
    return share.reshape(shape) * sample_cov + (1.0 - share).reshape(shape) * identity


# --------------------------------------------------------------------------- full
def _full_second_moment(Z, resp_w, n_features):
    n_components = resp_w.shape[1]
    s2 = np.empty((n_components, n_features, n_features))
    for k in range(n_components):
        rk = resp_w[:, k]
        rows = np.flatnonzero(rk)
        if rows.size == 0:
            s2[k] = 0.0
            continue
        if rows.size == rk.size:
            Zk, rk_used = Z, rk
        else:
            Zk, rk_used = Z[rows], rk[rows]
        s2[k] = (Zk * rk_used[:, None]).T @ Zk
    return s2


def _full_covariance(s0, s1, s2, n_eff, reg_covar, prior_weight):
    n_features = s1.shape[1]
    means = s1 / s0[:, None]
    cov = s2 / s0[:, None, None] - means[:, :, None] * means[:, None, :]
    cov = 0.5 * (cov + np.swapaxes(cov, 1, 2))
    cov = _shrink(cov, s0, n_eff, prior_weight, np.eye(n_features))
    idx = np.arange(n_features)
    cov[:, idx, idx] += reg_covar
    return cov


def _full_precision_cholesky(cov):
    n_components, n_features, _ = cov.shape
    try:
        chol = np.linalg.cholesky(cov)
    except np.linalg.LinAlgError as exc:
        bad = [k for k in range(n_components) if not _is_positive_definite(cov[k])]
        raise IllConditionedError(
            f"the covariance of component(s) {bad} is not positive definite even after "
            f"regularisation; {_REMEDY}"
        ) from exc
    # inverse of the lower factor, batched; tril keeps the triangle exact
    eye = np.broadcast_to(np.eye(n_features), cov.shape)
    inv_chol = np.tril(np.linalg.solve(chol, eye))
    return np.swapaxes(inv_chol, 1, 2)


def _is_positive_definite(matrix):
    try:
        np.linalg.cholesky(matrix)
    except np.linalg.LinAlgError:
        return False
    return True


def _full_log_det(prec_chol, n_features):
    return np.sum(np.log(np.diagonal(prec_chol, axis1=1, axis2=2)), axis=1)


def _full_log_gaussian(Z, means, prec_chol):
    n_samples = Z.shape[0]
    n_components, n_features = means.shape
    # One GEMM whitens the rows for every component at once: the K factors U_k stand
    # side by side in W, and a column of ones in Z folds the centring -mu_k U_k in.
    W = np.empty((n_features + 1, n_components * n_features))
    W[:n_features] = np.transpose(prec_chol, (1, 0, 2)).reshape(n_features, -1)
    W[n_features] = -np.einsum("kd,kde->ke", means, prec_chol).reshape(-1)
    Z1 = np.empty((n_samples, n_features + 1))
    Z1[:, :n_features] = Z
    Z1[:, n_features] = 1.0
    Y = (Z1 @ W).reshape(n_samples, n_components, n_features)
    maha = np.einsum("nkd,nkd->nk", Y, Y)
    log_det = _full_log_det(prec_chol, n_features)
    return -0.5 * (n_features * LOG_2PI + maha) + log_det


def _full_matrices(cov, n_features):
    return cov.copy()


def _full_n_parameters(n_components, n_features):
    return n_components * n_features * (n_features + 1) // 2


# --------------------------------------------------------------------------- diag
def _diag_second_moment(Z, resp_w, n_features):
    return resp_w.T @ (Z * Z)


def _diag_covariance(s0, s1, s2, n_eff, reg_covar, prior_weight):
    means = s1 / s0[:, None]
    var = np.maximum(s2 / s0[:, None] - means * means, 0.0)
    var = _shrink(var, s0, n_eff, prior_weight, 1.0)
    return var + reg_covar


def _diag_precision_cholesky(var):
    if np.any(~(var > 0.0)):
        raise IllConditionedError(
            f"a component has a non-positive variance even after regularisation; {_REMEDY}"
        )
    return 1.0 / np.sqrt(var)


def _diag_log_det(prec_chol, n_features):
    return np.sum(np.log(prec_chol), axis=1)


def _diag_log_gaussian(Z, means, prec_chol):
    n_features = means.shape[1]
    prec = prec_chol**2
    maha = (Z * Z) @ prec.T - 2.0 * (Z @ (means * prec).T) + np.sum(means**2 * prec, axis=1)
    np.maximum(maha, 0.0, out=maha)
    return -0.5 * (n_features * LOG_2PI + maha) + _diag_log_det(prec_chol, n_features)


def _diag_matrices(var, n_features):
    return np.einsum("kd,de->kde", var, np.eye(n_features))


def _diag_n_parameters(n_components, n_features):
    return n_components * n_features


# ---------------------------------------------------------------------- spherical
def _spherical_second_moment(Z, resp_w, n_features):
    return resp_w.T @ np.einsum("nd,nd->n", Z, Z) / n_features


def _spherical_covariance(s0, s1, s2, n_eff, reg_covar, prior_weight):
    means = s1 / s0[:, None]
    var = np.maximum(s2 / s0 - np.mean(means * means, axis=1), 0.0)
    var = _shrink(var, s0, n_eff, prior_weight, 1.0)
    return var + reg_covar


def _spherical_log_det(prec_chol, n_features):
    return n_features * np.log(prec_chol)


def _spherical_log_gaussian(Z, means, prec_chol):
    n_features = means.shape[1]
    prec = prec_chol**2
    maha = (
        np.einsum("nd,nd->n", Z, Z)[:, None] * prec
        - 2.0 * (Z @ means.T) * prec
        + np.sum(means**2, axis=1) * prec
    )
    np.maximum(maha, 0.0, out=maha)
    return -0.5 * (n_features * LOG_2PI + maha) + _spherical_log_det(prec_chol, n_features)


def _spherical_matrices(var, n_features):
    return var[:, None, None] * np.eye(n_features)


def _spherical_n_parameters(n_components, n_features):
    return n_components


class _Family:
    """The kernels of one covariance type (a namespace, not state)."""

    def __init__(self, name, **kernels):
        self.name = name
        for key, fn in kernels.items():
            setattr(self, key, fn)

    def __repr__(self):
        return f"<covariance family {self.name!r}>"


FAMILIES = {
    "full": _Family(
        "full",
        second_moment=_full_second_moment,
        covariance=_full_covariance,
        precision_cholesky=_full_precision_cholesky,
        log_det=_full_log_det,
        log_gaussian=_full_log_gaussian,
        matrices=_full_matrices,
        n_parameters=_full_n_parameters,
    ),
    "diag": _Family(
        "diag",
        second_moment=_diag_second_moment,
        covariance=_diag_covariance,
        precision_cholesky=_diag_precision_cholesky,
        log_det=_diag_log_det,
        log_gaussian=_diag_log_gaussian,
        matrices=_diag_matrices,
        n_parameters=_diag_n_parameters,
    ),
    "spherical": _Family(
        "spherical",
        second_moment=_spherical_second_moment,
        covariance=_spherical_covariance,
        precision_cholesky=_diag_precision_cholesky,
        log_det=_spherical_log_det,
        log_gaussian=_spherical_log_gaussian,
        matrices=_spherical_matrices,
        n_parameters=_spherical_n_parameters,
    ),
}

COVARIANCE_TYPES = tuple(FAMILIES)
