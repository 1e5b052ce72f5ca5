"""One family of kernels per covariance type, all with the same signatures.

Everything here works in *standardised units* (the pivot and scale frozen at warm-up)
and does no validation: callers in :mod:`shoal.core.mixture` check their inputs once.

Each family provides

``design(Z, out=None)``
    The design matrix the other kernels read, built once per block of rows: ``[Z, 1]``
    (full), ``[Z*Z, Z, 1]`` (diag) or ``[|z|^2, Z, 1]`` (spherical). With it, scoring is
    one GEMM and the first moments (and, for diag and spherical, the second) are one
    more. With ``out`` (shape (n_samples, ``width(n_features)``)) it is built there.
``width(n_features)``
    The number of columns of the design matrix.
``scoring_operator(means, prec_chol, log_weights)``
    Everything scoring needs that depends only on the parameters, packed once per
    parameter refresh.
``log_joint(A, operator, out=None)``
    ``log w_k + log N(z | mu_k, Sigma_k)`` for every component and every row of the
    design matrix ``A``, shape (n_components, n_samples), via the precision Cholesky
    factor: ``-0.5 (D log 2 pi + ||(z - mu) U||^2) + log det U``. Components come
    first so that the reductions over components run along contiguous rows. With
    ``out`` (C-contiguous, that shape) the result is written there.
``moments(A, resp_w)``
    The weighted statistics ``(s0, s1, s2)`` of a block, for ``resp_w`` of shape
    (n_components, n_samples): sums of
    ``r_ik``, ``r_ik z_i`` and ``r_ik z_i z_i^T`` (full), its diagonal (diag) or its
    trace divided by ``D`` (spherical). Rows whose weight for a component is zero are
    skipped (sparse EM), which is where the full type saves most of its time.
``weighted_moments(A, resp, row_w, floor)``
    The statistics of a block for the stepwise update: ``moments`` with weights
    ``resp * row_w``, where responsibilities below ``floor`` count as zero (sparse
    EM). ``resp`` has shape (n_components, n_samples), ``row_w`` (n_samples,).
``split_moments(P, n_features)``
    ``(s0, s1, s2)`` from the products of weights and design: ``P[k] = sum_i w_ik
    a_i a_i^T`` (full, shape (K, W, W)) or ``P[k] = sum_i w_ik a_i`` (diag and
    spherical, shape (K, W)), ``a_i`` the design row.
``covariance(s0, s1, s2, n_eff, reg_covar, prior_weight)``
    Covariances from sufficient statistics, shrunk towards the identity by a weak
    conjugate (inverse-Wishart-like) prior worth ``prior_weight`` rows, plus
    ``reg_covar`` on the diagonal.
``precision_cholesky(cov)``
    Upper-triangular ``U`` with ``U U^T = cov^-1`` (full), or ``1/sqrt(var)``.
``log_det(prec_chol, n_features)``
    ``log det U``, i.e. ``-0.5 log det cov``, per component.
``matrices(cov, n_features)``
    Full ``(K, D, D)`` matrices, for reporting and for the drift distances.
``n_parameters(n_components, n_features)``
    Free covariance parameters, for BIC.
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import lapack

from .errors import IllConditionedError

__all__ = ["FAMILIES", "COVARIANCE_TYPES", "LOG_2PI", "not_positive_definite",
           "non_positive_variance"]

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
def _full_width(n_features):
    return n_features + 1


def _full_design(Z, out=None):
    A = np.empty((Z.shape[0], Z.shape[1] + 1)) if out is None else out
    A[:, :-1] = Z
    A[:, -1] = 1.0
    return A


def _full_moments(A, resp_w):
    n_features = A.shape[1] - 1
    first = resp_w @ A                        # (K, D + 1): s1 and s0 in one GEMM
    Z = A[:, :n_features]
    n_components = resp_w.shape[0]
    s2 = np.empty((n_components, n_features, n_features))
    for k in range(n_components):
        rk = resp_w[k]
        rows = np.flatnonzero(rk)
        if rows.size == rk.size:
            s2[k] = (Z * rk[:, None]).T @ Z
        elif rows.size:
            Zk = Z[rows]
            s2[k] = (Zk * rk[rows, None]).T @ Zk
        else:
            s2[k] = 0.0
    return first[:, -1], first[:, :-1], s2


def _full_weighted_moments(A, resp, row_w, floor):
    # Component by component on the rows that count for it: one (D+1) x (D+1) GEMM
    # of the design gives s2, s1 and s0 together, and no (K, n) weight matrix is made.
    n_components = resp.shape[0]
    width = A.shape[1]
    M = np.empty((n_components, width, width))
    for k in range(n_components):
        rk = resp[k]
        rows = np.flatnonzero(rk >= floor) if floor > 0.0 else np.flatnonzero(rk)
        if rows.size == 0:
            M[k] = 0.0
            continue
        if rows.size == rk.size:
            Ak, wk = A, rk * row_w
        else:
            Ak = A[rows]
            wk = rk[rows]
            wk *= row_w[rows]
        M[k] = (Ak * wk[:, None]).T @ Ak
    return _full_split_moments(M, A.shape[1] - 1)


def _dense_weighted_moments(moments):
    def weighted_moments(A, resp, row_w, floor):
        resp_w = resp * row_w
        if floor > 0.0:
            resp_w[resp < floor] = 0.0
        return moments(A, resp_w)
    return weighted_moments


def _full_split_moments(P, n_features):
    return P[:, -1, -1].copy(), P[:, -1, :-1].copy(), P[:, :-1, :-1].copy()


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
    # LAPACK potrf (Cholesky, lower) then trtri (triangular inverse) per component:
    # a triangular inverse, not a general solve against the identity, and a failed
    # component is named rather than failing the whole stack.
    out = np.empty_like(cov)
    bad = []
    for k in range(cov.shape[0]):
        if not np.all(np.isfinite(cov[k])):
            bad.append(k)
            continue
        chol, info = lapack.dpotrf(cov[k], lower=1, clean=1)
        if info == 0:
            inv_chol, info = lapack.dtrtri(chol, lower=1)
        if info != 0:
            bad.append(k)
            continue
        out[k] = inv_chol.T          # upper triangular U with U U^T = cov^-1
    if bad:
        raise not_positive_definite(bad)
    return out


def not_positive_definite(components) -> IllConditionedError:
    """The error for full covariances that no Cholesky factor exists for.

    Parameters
    ----------
    components : iterable of int
        The components whose covariance failed to factorise.

    Returns
    -------
    error : IllConditionedError
        Its message names the components and the remedies; the caller raises it.
    """
    return IllConditionedError(
        f"the covariance of component(s) {list(components)} is not positive definite even "
        f"after regularisation; {_REMEDY}"
    )


def _full_log_det(prec_chol, n_features):
    return np.sum(np.log(np.diagonal(prec_chol, axis1=1, axis2=2)), axis=1)


def _full_scoring_operator(means, prec_chol, log_weights):
    n_components, n_features = means.shape
    # The K factors U_k^T stacked, so that one GEMM whitens the rows for every
    # component; the design's column of ones folds the centring -mu_k U_k in. The
    # factor sqrt(1/2) makes the sums of squares half the Mahalanobis distances.
    WT = np.empty((n_components * n_features, n_features + 1))
    WT[:, :n_features] = np.swapaxes(prec_chol, 1, 2).reshape(-1, n_features)
    WT[:, n_features] = -np.einsum("kd,kde->ke", means, prec_chol).reshape(-1)
    WT *= np.sqrt(0.5)
    const = log_weights + _full_log_det(prec_chol, n_features) - 0.5 * n_features * LOG_2PI
    return WT, const[:, None]


def _full_log_joint(A, operator, out=None):
    WT, const = operator
    n_samples = A.shape[0]
    n_components = const.shape[0]
    Y = (WT @ A.T).reshape(n_components, -1, n_samples)
    half_maha = np.einsum("kdn,kdn->kn", Y, Y, out=out)
    return np.subtract(const, half_maha, out=half_maha)


def _full_matrices(cov, n_features):
    return cov.copy()


def _full_n_parameters(n_components, n_features):
    return n_components * n_features * (n_features + 1) // 2


# --------------------------------------------------------------------------- diag
def _diag_width(n_features):
    return 2 * n_features + 1


def _diag_design(Z, out=None):
    n_features = Z.shape[1]
    A = np.empty((Z.shape[0], 2 * n_features + 1)) if out is None else out
    np.square(Z, out=A[:, :n_features])
    A[:, n_features:-1] = Z
    A[:, -1] = 1.0
    return A


def _diag_moments(A, resp_w):
    # (K, 2D + 1): s2, s1 and s0 in one GEMM
    return _diag_split_moments(resp_w @ A, (A.shape[1] - 1) // 2)


def _diag_split_moments(P, n_features):
    return P[:, -1], P[:, n_features:-1], P[:, :n_features]


def _diag_covariance(s0, s1, s2, n_eff, reg_covar, prior_weight):
    means = s1 / s0[:, None]
    var = np.maximum(s2 / s0[:, None] - means * means, 0.0)
    var = _shrink(var, s0, n_eff, prior_weight, 1.0)
    return var + reg_covar


def _diag_precision_cholesky(var):
    if np.any(~(var > 0.0)):
        raise non_positive_variance()
    return 1.0 / np.sqrt(var)


def non_positive_variance() -> IllConditionedError:
    """The error for diag or spherical variances that are not positive.

    Returns
    -------
    error : IllConditionedError
        Its message gives the remedies; the caller raises it.
    """
    return IllConditionedError(
        f"a component has a non-positive variance even after regularisation; {_REMEDY}"
    )


def _diag_log_det(prec_chol, n_features):
    return np.sum(np.log(prec_chol), axis=1)


def _diag_scoring_operator(means, prec_chol, log_weights):
    # ||(z - mu) / sigma||^2 expanded: z^2 p - 2 z mu p + mu^2 p, one GEMM with the
    # design [z^2, z, 1]; the constants (log weight and normaliser too) ride in the
    # last column.
    n_components, n_features = means.shape
    prec = prec_chol**2
    BT = np.empty((n_components, 2 * n_features + 1))
    BT[:, :n_features] = -0.5 * prec
    BT[:, n_features:-1] = means * prec
    BT[:, -1] = (log_weights - 0.5 * np.sum(means**2 * prec, axis=1)
                 + _diag_log_det(prec_chol, n_features) - 0.5 * n_features * LOG_2PI)
    return BT


def _linear_log_joint(A, operator, out=None):
    return np.matmul(operator, A.T, out=out)


def _diag_matrices(var, n_features):
    return np.einsum("kd,de->kde", var, np.eye(n_features))


def _diag_n_parameters(n_components, n_features):
    return n_components * n_features


# ---------------------------------------------------------------------- spherical
def _spherical_width(n_features):
    return n_features + 2


def _spherical_design(Z, out=None):
    n_features = Z.shape[1]
    A = np.empty((Z.shape[0], n_features + 2)) if out is None else out
    A[:, 0] = np.einsum("nd,nd->n", Z, Z)
    A[:, 1:-1] = Z
    A[:, -1] = 1.0
    return A


def _spherical_moments(A, resp_w):
    return _spherical_split_moments(resp_w @ A, A.shape[1] - 2)


def _spherical_split_moments(P, n_features):
    return P[:, -1], P[:, 1:-1], P[:, 0] / n_features


def _spherical_covariance(s0, s1, s2, n_eff, reg_covar, prior_weight):
    means = s1 / s0[:, None]
    var = np.maximum(s2 / s0 - np.mean(means * means, axis=1), 0.0)
    var = _shrink(var, s0, n_eff, prior_weight, 1.0)
    return var + reg_covar


def _spherical_log_det(prec_chol, n_features):
    return n_features * np.log(prec_chol)


def _spherical_scoring_operator(means, prec_chol, log_weights):
    n_components, n_features = means.shape
    prec = prec_chol**2
    BT = np.empty((n_components, n_features + 2))
    BT[:, 0] = -0.5 * prec
    BT[:, 1:-1] = means * prec[:, None]
    BT[:, -1] = (log_weights - 0.5 * np.sum(means**2, axis=1) * prec
                 + _spherical_log_det(prec_chol, n_features) - 0.5 * n_features * LOG_2PI)
    return BT


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


_KERNEL_NAMES = ("design", "width", "moments", "split_moments", "covariance", "log_det",
                 "scoring_operator", "matrices", "n_parameters")


def _family(name, **shared):
    """The family ``name``: each kernel is ``_<name>_<kernel>`` unless given in ``shared``."""
    kernels = {key: globals()[f"_{name}_{key}"] for key in _KERNEL_NAMES}
    return _Family(name, **kernels, **shared)


FAMILIES = {
    "full": _family("full", weighted_moments=_full_weighted_moments,
                    precision_cholesky=_full_precision_cholesky, log_joint=_full_log_joint),
    "diag": _family("diag", weighted_moments=_dense_weighted_moments(_diag_moments),
                    precision_cholesky=_diag_precision_cholesky, log_joint=_linear_log_joint),
    "spherical": _family("spherical",
                         weighted_moments=_dense_weighted_moments(_spherical_moments),
                         precision_cholesky=_diag_precision_cholesky,
                         log_joint=_linear_log_joint),
}

COVARIANCE_TYPES = tuple(FAMILIES)
