"""Rows with missing features: marginal scoring and EM with missing data.

A missing feature is NaN in the rows handed to :class:`~shoal.core.mixture.Mixture`.
For a row with observed features ``o`` and missing ``m``, component ``k`` scores the
row by its Gaussian marginal over ``o`` (mean ``mu_o``, covariance ``Sigma_oo``), and
the E-step of learning completes the row with the conditional mean and adds the
conditional covariance to the second moment (Ghahramani & Jordan 1994, "Supervised
learning from incomplete data via an EM approach"; Little & Rubin, *Statistical
Analysis with Missing Data*, ch. 11):

    E[z_m | z_o, k]        = mu_m + Sigma_mo Sigma_oo^-1 (z_o - mu_o)
    Cov[z_m | z_o, k]      = Sigma_mm - Sigma_mo Sigma_oo^-1 Sigma_om
    E[z z^T | z_o, k]      = zhat zhat^T + [[0, 0], [0, Cov[z_m | z_o, k]]]

The full type works from the precision ``Lam = Sigma^-1 = U U^T`` rather than from
``Sigma_oo^-1``, so that rows need no factorisation per missingness pattern: with the
missing coordinates filled by any value (zero here, the warm-up mean) and
``d = z - mu``, ``g = (Lam d)_m`` and ``H = Lam_mm``,

    (z_o - mu_o)^T Sigma_oo^-1 (z_o - mu_o) = d^T Lam d - g^T H^-1 g
    log det Sigma_oo = log det Sigma + log det H
    E[z_m | z_o] = z_m - H^-1 g,         Cov[z_m | z_o] = H^-1

(the Schur complement of ``Lam_mm`` in ``Lam`` is ``Sigma_oo^-1``). So the log-density
of the filled row by the ordinary scoring kernels, plus a correction that needs only the
``|m| x |m|`` block ``H``, is the marginal log-density. Rows are grouped by how many
features they miss: one and two in closed form, more by batched LAPACK. The diag and
spherical types drop the missing terms from the sum (``H`` is diagonal).

Complete rows never come here: the mixture sends them down its ordinary paths and only
the rows with a gap, filled, through these kernels.
"""

from __future__ import annotations

import numpy as np

from .covariance import LOG_2PI
from .gaps import Gaps, MissingValues, fill, find, not_finite

__all__ = ["Gaps", "MissingValues", "not_finite", "find", "fill", "gap_log_joint",
           "gap_correction", "gap_moments", "completion_moments", "expected_scatter",
           "precision_matrices"]

BLOCK_ROWS = 2048   # incomplete rows handled at once: (K, rows, D) arrays stay small


# ------------------------------------------------------------------- full type
def precision_matrices(model):
    """The full type's precisions ``Lam_k = U_k U_k^T`` and ``Lam_k mu_k``.

    Parameters
    ----------
    model : Mixture
        A full-covariance mixture.

    Returns
    -------
    lam : ndarray of shape (n_components, n_features, n_features)
    lam_mu : ndarray of shape (n_components, n_features)
    """
    U = model.prec_chol
    lam = U @ np.swapaxes(U, 1, 2)
    return lam, np.einsum("kde,ke->kd", lam, model.means)


class _Pairs:
    """The (row, missing feature) pairs of a block of rows with gaps.

    ``row``, ``col``: the pairs in row order (each row's features increasing);
    ``start[i]``: where row ``i``'s pairs begin; ``count[i]``: how many it has;
    ``by_col``: the pairs ordered by feature, ``ends[c]``: where feature ``c``'s end;
    ``place[p]``: where pair ``p`` sits in that order.
    """

    __slots__ = ("row", "col", "start", "count", "by_col", "ends", "place")

    def __init__(self, mask):
        self.row, self.col = np.nonzero(mask)
        self.count = np.count_nonzero(mask, axis=1)
        self.start = np.cumsum(self.count) - self.count
        self.by_col = np.argsort(self.col, kind="stable")
        self.ends = np.cumsum(np.bincount(self.col, minlength=mask.shape[1]))
        self.place = np.empty_like(self.by_col)
        self.place[self.by_col] = np.arange(self.place.size)

    def columns(self):
        """``(c, lo, hi)``: feature ``c`` is missing in pairs ``by_col[lo:hi]``."""
        lo = 0
        for c, hi in enumerate(self.ends.tolist()):
            if hi > lo:
                yield c, lo, hi
            lo = hi

    def exactly(self, r):
        """``(rows, at)``: the rows missing ``r`` features and their pairs' indices
        (len(rows), r)."""
        rows = np.flatnonzero(self.count == r)
        return rows, self.start[rows][:, None] + np.arange(r)

    def several(self, least):
        """``(rows, at, valid)``: the rows missing ``least`` features or more, their
        pairs' indices (len(rows), r) padded to the largest count ``r`` with the index
        one past the last pair, and where the indices are real (len(rows), r)."""
        rows = np.flatnonzero(self.count >= least)
        r = int(self.count[rows].max()) if rows.size else 0
        valid = np.arange(r) < self.count[rows][:, None]
        at = np.where(valid, self.start[rows][:, None] + np.arange(r), self.row.size)
        return rows, at, valid


def _solve_small(H, g):
    """``H^-1 g``, ``H^-1`` and ``log det H`` for stacks of small positive-definite ``H``
    of shape (..., r, r), ``g`` (..., r); closed forms for r = 1 and 2, where LAPACK's
    cost per matrix would dominate."""
    r = H.shape[-1]
    if r == 1:
        inv = 1.0 / H
        return g * inv[..., 0], inv, np.log(H[..., 0, 0])
    if r == 2:
        a, b, c = H[..., 0, 0], H[..., 0, 1], H[..., 1, 1]
        det = a * c - b * b
        inv = np.empty_like(H)
        inv[..., 0, 0], inv[..., 1, 1] = c / det, a / det
        inv[..., 0, 1] = inv[..., 1, 0] = -b / det
        return np.einsum("...rs,...s->...r", inv, g), inv, np.log(det)
    # Gauss-Jordan elimination over the whole stack at once, no pivoting: a positive
    # definite matrix keeps positive pivots (they are the squares of its Cholesky
    # diagonal), and one vectorised pass costs less than LAPACK's per-matrix calls
    A = np.array(H, dtype=np.float64)
    inv = np.broadcast_to(np.eye(r), H.shape).copy()
    log_det = np.zeros(H.shape[:-2])
    for j in range(r):
        pivot = A[..., j, j].copy()
        if not np.all(pivot > 0.0):
            raise np.linalg.LinAlgError("a precision block is not positive definite")
        log_det += np.log(pivot)
        A[..., j, :] /= pivot[..., None]
        inv[..., j, :] /= pivot[..., None]
        factor = A[..., :, j].copy()
        factor[..., j] = 0.0
        A -= factor[..., :, None] * A[..., None, j, :]
        inv -= factor[..., :, None] * inv[..., None, j, :]
    return np.einsum("...rs,...s->...r", inv, g), inv, log_det


def _full_gaps(model, Z, mask, learn):
    """Correction (K, n) to the filled rows' log-joint and, with ``learn``, per group of
    rows missing as many features: ``(rows, at, step, inv)`` with ``step = H^-1 g``
    (K, len(rows), r) and ``inv = H^-1`` (K, len(rows), r, r)."""
    lam, lam_mu = precision_matrices(model)
    K, n, D = model.n_components, Z.shape[0], Z.shape[1]
    pairs = _Pairs(mask)
    # g = (Lam (z - mu))_m for every (row, missing feature) pair: one small product
    # per feature over the rows that miss it (a D-th of the product over all of Lam)
    Zp = Z[pairs.row[pairs.by_col]]
    gp = np.empty((K, pairs.row.size))     # pairs ordered by feature
    for c, lo, hi in pairs.columns():
        np.matmul(lam[:, c, :], Zp[lo:hi].T, out=gp[:, lo:hi])
    gp -= lam_mu[:, pairs.col[pairs.by_col]]
    corr = np.empty((K, n))
    pieces = []
    diag = np.diagonal(lam, axis1=1, axis2=2)
    # one missing feature (most rows): H is the precision's diagonal entry
    rows, at = pairs.exactly(1)
    if rows.size:
        c = pairs.col[at[:, 0]]
        g = gp[:, pairs.place[at[:, 0]]]
        h = diag[:, c]
        step = g / h
        corr[:, rows] = 0.5 * (LOG_2PI - np.log(h) + g * step)
        if learn:
            pieces.append((rows, at, step[:, :, None], (1.0 / h)[:, :, None, None]))
    # two: in closed form
    rows, at = pairs.exactly(2)
    if rows.size:
        cols = pairs.col[at]
        g = gp[:, pairs.place[at]]
        H = lam[:, cols[:, :, None], cols[:, None, :]]
        step, inv, log_det = _solve_small(H, g)
        corr[:, rows] = 0.5 * (2 * LOG_2PI - log_det + np.sum(g * step, axis=-1))
        if learn:
            pieces.append((rows, at, step, inv))
    # more (few rows): one batch, each H padded to the largest with an identity block
    # (inverse and determinant of the real block unchanged; g is zero in the padding)
    rows, at, valid = pairs.several(3)
    if rows.size:
        r = at.shape[1]
        cols = np.append(pairs.col, 0)[at]
        g = np.append(gp, np.zeros((K, 1)), axis=1)[:, np.append(pairs.place, -1)[at]]
        real = valid[:, :, None] & valid[:, None, :]
        H = np.where(real, lam[:, cols[:, :, None], cols[:, None, :]], np.eye(r))
        step, inv, log_det = _solve_small(H, g)
        inv *= real
        count = pairs.count[rows]
        corr[:, rows] = 0.5 * (count * LOG_2PI - log_det + np.sum(g * step, axis=-1))
        if learn:
            pieces.append((rows, at, step, inv))
    return corr, (Z, pairs, Zp, pieces) if learn else None


def _full_correction(W, aux):
    """What completing the rows adds to the moments of the filled rows, weights ``W``
    (K, n): ``(s1, s2)`` of shapes (K, D) and (K, D, D).

    A row completes to ``zhat = z + delta`` with ``delta = -H^-1 g`` on its missing
    features (``z`` is zero there), so ``zhat zhat^T + Cov = z z^T + z delta^T +
    delta z^T + delta delta^T + Cov``: the first term is the filled row's, the cross
    terms fill the missing columns, the last two the missing-by-missing block."""
    Z, pairs, Zp, pieces = aux
    K, D = W.shape[0], Z.shape[1]
    comp = np.arange(K)[:, None]
    V = np.empty((K, pairs.row.size + 1))    # W * H^-1 g = -W delta, per pair (+ padding)
    s2 = np.zeros(K * D * D)
    for rows, at, step, inv in pieces:
        n, r = at.shape
        ws = W[:, rows, None] * step
        V[:, at.ravel()] = ws.reshape(K, n * r)
        cols = np.append(pairs.col, 0)[at]       # the padding weighs nothing
        block = step[..., :, None] * step[..., None, :] + inv
        cell = (cols[:, :, None] * D + cols[:, None, :]).reshape(n * r * r)
        s2 += np.bincount((comp * (D * D) + cell).ravel(),
                          weights=(W[:, rows, None] * block.reshape(K, n, r * r)).ravel(),
                          minlength=K * D * D)
    V = V[:, :-1]
    s1 = -np.bincount((comp * D + pairs.col).ravel(), weights=V.ravel(), minlength=K * D)
    s2 = s2.reshape(K, D, D)
    # cross terms, one missing feature at a time: sum_i -W_ki delta_kic z_i
    Vc = V[:, pairs.by_col]
    cross = np.zeros((K, D, D))
    for c, lo, hi in pairs.columns():
        cross[:, c, :] = Vc[:, lo:hi] @ Zp[lo:hi]
    s2 -= cross
    s2 -= np.swapaxes(cross, 1, 2)
    return s1.reshape(K, D), s2


# ------------------------------------------------------- diag and spherical types
def _diag_gaps(model, Z, mask, learn):
    # With the missing z at zero each missing feature j adds the same term to every row
    # that misses it: 0.5 (log 2 pi - log prec_kj + prec_kj mu_kj^2); one product sums
    # them. The missing coordinates complete to the component's mean, with its variance.
    D = Z.shape[1]
    prec = model.prec_chol ** 2
    if prec.ndim == 1:
        prec = np.repeat(prec[:, None], D, axis=1)
    M = mask.astype(np.float64)
    term = 0.5 * (LOG_2PI - np.log(prec) + prec * model.means**2)
    corr = term @ M.T
    return corr, ((Z, M, model.means, 1.0 / prec) if learn else None)


def _diag_correction(W, aux):
    """What completing the rows adds to the moments of the filled rows: ``(s1, diagonal
    of s2)``; a missing coordinate completes to the component's mean, with its variance."""
    Z, M, means, var = aux
    WM = W @ M
    return means * WM, (means * means + var) * WM


def _diag_completed(aux):
    """The completed rows (K, n, D) and their conditional variances (K, n, D)."""
    Z, M, means, var = aux
    mask = M.astype(bool)
    return (np.where(mask[None], means[:, None, :], Z[None]),
            M[None] * var[:, None, :])


_GAPS = {"full": _full_gaps, "diag": _diag_gaps, "spherical": _diag_gaps}


def _scale_term(model, mask):
    """``sum(log scale[m])`` per row: the mixture subtracts the log-scale of every feature,
    a marginal only those of the observed ones."""
    return mask @ np.log(model.scale)


def gap_log_joint(model, Zf, mask, learn=False):
    """``log w_k + log N(z_o | mu_ko, Sigma_koo)`` for rows with gaps, standardised units.

    Parameters
    ----------
    model : Mixture
    Zf : ndarray of shape (n_samples, n_features)
        Standardised rows with the missing features filled by zero.
    mask : ndarray of shape (n_samples, n_features)
        True where a feature is missing.
    learn : bool
        Also return what the E-step needs.

    Returns
    -------
    log_joint : ndarray of shape (n_components, n_samples)
        Plus ``sum(log scale[m])`` per row, so that subtracting the log-scale of every
        feature (as the mixture does) leaves the data-unit marginal.
    aux : tuple or None
        With ``learn``: the completed rows and the conditional covariances.
    """
    family = model.family
    base = family.log_joint(family.design(Zf), model.scoring_operator)
    corr, aux = gap_correction(model, Zf, mask, learn)
    base += corr
    return base, aux


def gap_correction(model, Zf, mask, learn=False):
    """What turns the log-joint of rows filled at zero into their marginal log-joint.

    Parameters
    ----------
    model : Mixture
    Zf : ndarray of shape (n_samples, n_features)
        Standardised rows with the missing features filled by zero.
    mask : ndarray of shape (n_samples, n_features)
        True where a feature is missing.
    learn : bool
        Also return what the E-step needs.

    Returns
    -------
    correction : ndarray of shape (n_components, n_samples)
        To add to ``log w_k + log N(z | mu_k, Sigma_k)`` of the filled rows: the result
        is :func:`gap_log_joint`'s.
    aux : tuple or None
        With ``learn``: the completed rows and the conditional covariances, for
        :func:`gap_moments`.
    """
    corr, aux = _GAPS[model.covariance](model, Zf, mask, learn)
    corr += _scale_term(model, mask)
    return corr, (aux if learn else None)


def gap_moments(model, W, aux):
    """Statistics ``(s0, s1, s2)`` of rows with gaps for the E-step weights ``W``.

    Parameters
    ----------
    model : Mixture
    W : ndarray of shape (n_components, n_samples)
        The rows' E-step weights.
    aux : tuple
        From :func:`gap_correction` (or :func:`gap_log_joint`) with ``learn``.

    Returns
    -------
    s0 : ndarray of shape (n_components,)
    s1 : ndarray of shape (n_components, n_features)
    s2 : ndarray of shape (n_components, n_features, n_features), (n_components,
        n_features) or (n_components,), as the mixture's covariance type keeps it
        The completed rows' moments plus the conditional covariances.
    """
    family = model.family
    s0, s1, s2 = family.moments(family.design(aux[0]), W)
    c1, c2 = completion_moments(model, W, aux)
    return s0, s1 + c1, s2 + c2


def completion_moments(model, W, aux):
    """What completing rows with gaps adds to the moments of the rows filled at zero.

    Parameters
    ----------
    model : Mixture
    W : ndarray of shape (n_components, n_samples)
        The rows' E-step weights.
    aux : tuple
        From :func:`gap_correction` with ``learn``.

    Returns
    -------
    s1 : ndarray of shape (n_components, n_features)
    s2 : ndarray of shape (n_components, n_features, n_features), (n_components,
        n_features) or (n_components,), as the mixture's covariance type keeps it
        Added to the filled rows' statistics with weights ``W`` they give those of
        :func:`gap_moments`.
    """
    if model.covariance == "full":
        return _full_correction(W, aux)
    s1, s2 = _diag_correction(W, aux)
    if model.covariance == "spherical":
        s2 = s2.sum(axis=1) / model.n_features
    return s1, s2


# ---------------------------------------------------------------- drift windows
def expected_scatter(model, Zf, mask, resp):
    """E-step moments of rows with gaps for given responsibilities, standardised units.

    Parameters
    ----------
    model : Mixture
    Zf : ndarray of shape (n_samples, n_features)
        Standardised rows, the missing features at zero.
    mask : ndarray of shape (n_samples, n_features)
        True where a feature is missing.
    resp : ndarray of shape (n_components, n_samples)
        The rows' weights per component.

    Returns
    -------
    s1 : ndarray of shape (n_components, n_features)
        ``sum_i resp_ki E[z_i | z_io, k]``.
    scatter : ndarray of shape (n_components, n_features, n_features)
        ``sum_i resp_ki E[z_i z_i^T | z_io, k]`` as a full matrix whatever the type.
    """
    _, aux = gap_correction(model, Zf, mask, learn=True)
    D = Zf.shape[1]
    if model.covariance == "full":
        s1, scatter = _full_correction(resp, aux)
        s1 += resp @ Zf
        for k in range(resp.shape[0]):
            scatter[k] += (Zf * resp[k][:, None]).T @ Zf
        return s1, scatter
    zhat, cond = _diag_completed(aux)
    s1 = np.einsum("kn,knd->kd", resp, zhat)
    scatter = np.matmul(np.swapaxes(zhat * resp[:, :, None], 1, 2), zhat)
    idx = np.arange(D)
    scatter[:, idx, idx] += np.einsum("kn,knd->kd", resp, cond)
    return s1, scatter
