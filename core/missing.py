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
features they miss: one and two in closed form, more by one elimination over the stack
(:mod:`shoal.core.gap_layout`). The diag and spherical types drop the missing terms from
the sum (``H`` is diagonal).

Complete rows never come here: the mixture sends them down its ordinary paths and only
the rows with a gap, filled, through these kernels.
"""

from __future__ import annotations

import numpy as np

from .covariance import LOG_2PI
from .gap_layout import GapLayout, full_completion, full_span, precision_matrices
from .gaps import Gaps, MissingValues, fill, find, not_finite

__all__ = ["Gaps", "MissingValues", "not_finite", "find", "fill", "GapLayout",
           "gap_log_joint", "gap_correction", "span_correction", "gap_moments",
           "completion_moments", "span_completion", "expected_scatter", "precision_matrices"]

BLOCK_ROWS = 2048   # incomplete rows handled at once: (K, rows, D) arrays stay small


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


def _diag_span(model, layout, part, learn, out):
    a, b, lo = part[:3]
    corr, aux = _diag_gaps(model, layout.Zf[a:b], layout.mask[a:b], learn)
    corr += layout.scale_term[a:b]
    out[layout.rows[a:b] - lo] = corr.T
    return aux


def _diag_correction(W, aux):
    """What completing the rows adds to the moments of the filled rows: ``(s1, diagonal
    of s2)``; a missing coordinate completes to the component's mean, with its variance."""
    Z, M, means, var = aux[:4]
    WM = W @ M
    return means * WM, (means * means + var) * WM


def _diag_completed(aux):
    """The completed rows (K, n, D) and their conditional variances (K, n, D)."""
    Z, M, means, var = aux[:4]
    mask = M.astype(bool)
    return (np.where(mask[None], means[:, None, :], Z[None]),
            M[None] * var[:, None, :])


_SPANS = {"full": full_span, "diag": _diag_span, "spherical": _diag_span}


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
    n = Zf.shape[0]
    layout = GapLayout(np.arange(n), Zf, mask, np.log(model.scale), model.covariance)
    corr = np.empty((n, model.n_components))
    return corr.T, span_correction(model, layout, layout.span(0, n), corr, learn)


def span_correction(model, layout, part, out, learn=False):
    """:func:`gap_correction` of the rows ``part`` of a layout, into their columns of
    ``out``.

    Parameters
    ----------
    model : Mixture
    layout : GapLayout
    part : tuple
        From ``layout.span``.
    out : ndarray of shape (n, n_components)
        C-ordered; gets the correction of the span's row numbered ``i`` in row
        ``i - lo`` (``lo`` where the span starts; its other rows untouched).
    learn : bool
        Also return what the E-step needs.

    Returns
    -------
    aux : tuple or None
        With ``learn``, for :func:`span_completion`.
    """
    aux = _SPANS[model.covariance](model, layout, part, learn, out)
    if not learn:
        return None
    return (layout.Zf[part[0]:part[1]],) + aux


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
    return span_completion(model, np.ascontiguousarray(W.T), aux)


def span_completion(model, W, aux):
    """:func:`completion_moments` of the rows of a span.

    Parameters
    ----------
    model : Mixture
    W : ndarray of shape (n_part, n_components)
        The E-step weights of the span's rows, C-ordered.
    aux : tuple
        From :func:`span_correction` with ``learn``.

    Returns
    -------
    s1, s2 : ndarray
        As :func:`completion_moments`'.
    """
    if model.covariance == "full":
        return full_completion(W, aux[1:])
    s1, s2 = _diag_correction(W.T, aux[1:])
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
        s1, scatter = full_completion(np.ascontiguousarray(resp.T), aux[1:])
        s1 += resp @ Zf
        for k in range(resp.shape[0]):
            scatter[k] += (Zf * resp[k][:, None]).T @ Zf
        return s1, scatter
    zhat, cond = _diag_completed(aux[1:])
    s1 = np.einsum("kn,knd->kd", resp, zhat)
    scatter = np.matmul(np.swapaxes(zhat * resp[:, :, None], 1, 2), zhat)
    idx = np.arange(D)
    scatter[:, idx, idx] += np.einsum("kn,knd->kd", resp, cond)
    return s1, scatter
