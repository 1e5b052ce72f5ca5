"""One drift window's statistics per segment, from its additive sums, over arrays.

A window keeps per segment ``k`` (the rows of arrays of shape ``(n_components, ...)``),
with responsibilities ``r_ik`` and rows centred on the model's centre ``c``:

``T[k] = sum_i r_ik``, ``Q[k] = sum_i r_ik^2``, ``M[k] = sum_i r_ik (x_i - c)`` and
``S[k] = sum_i r_ik (x_i - c)(x_i - c)^T``,

and, for rows with missing features, ``miss[k, j]`` (the responsibility mass of the
rows that missed feature ``j``), ``miss2[k, j]`` (its squares) and ``imputed[k, j]``
(the part of ``M`` filled in by the E-step). From them, for all segments at once:
the share of the window's rows, Kish's effective rows ``T^2 / Q``, the weighted mean
``c + M / T`` and covariance ``S / T - (M / T)(M / T)^T``, and the drift statistics
of :mod:`shoal.core.drift` with their noise levels (:mod:`shoal.core.drift_noise`).
Sums are additive, so a window may span inputs and be checkpointed between them. The
means, covariances, mean shifts and log-determinants come from one compiled loop when
the kernels are in use (:mod:`shoal.core.fused`), else from batched numpy and LAPACK
calls: the same up to the order of the floating-point operations (tests compare them).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, fields

import numpy as np

from . import fused
from .drift_noise import mean_shift_noise, spread_noise, spread_variance, weight_noise

__all__ = ["NEGLIGIBLE", "WindowSums", "SegmentStatistics", "add_segment_scatter",
           "add_segment_variances",
           "piece_sums", "projected_covariances",
           "stack_sums", "window_statistics", "fit_statistics"]

NEGLIGIBLE = 1e-12
"""Responsibilities at or below this are left out of a window's second moments: such
rows add less than that share of a row each, far below the statistics' noise, and on
separated segments most rows are skipped."""


def add_segment_scatter(S: np.ndarray, X: np.ndarray, resp_kn: np.ndarray,
                        floor: float) -> None:
    """Add each segment's weighted scatter of ``X`` into ``S``, in place.

    ``S[k] += sum_i resp_kn[k, i] x_i x_i^T`` over the rows whose responsibility for
    ``k`` is above ``floor``. One compiled pass where the tiled kernels run, else a
    gather and a product per segment.

    Parameters
    ----------
    S : ndarray of shape (n_components, n_features, n_features)
    X : ndarray of shape (n_samples, n_features)
    resp_kn : ndarray of shape (n_components, n_samples)
    floor : float
    """
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


def add_segment_variances(S: np.ndarray, X: np.ndarray, resp_kn: np.ndarray) -> None:
    """Add each segment's weighted sums of squares of ``X`` to the diagonals of ``S``,
    in place: ``S[k, j, j] += sum_i resp_kn[k, i] x_ij^2``, one matrix product.

    What a diag or spherical model's window statistics read of the second moments
    (the off-diagonal entries are left as they are: those types compare variances).

    Parameters
    ----------
    S : ndarray of shape (n_components, n_features, n_features)
    X : ndarray of shape (n_samples, n_features)
    resp_kn : ndarray of shape (n_components, n_samples)
    """
    d = X.shape[1]
    at = np.arange(d)
    S[:, at, at] += resp_kn @ (X * X)


def piece_sums(resp_kn: np.ndarray, Xc: np.ndarray):
    """A piece's first-order window sums: one pass over the responsibilities and one
    matrix product.

    Parameters
    ----------
    resp_kn : ndarray of shape (n_components, n_samples)
    Xc : ndarray of shape (n_samples, n_features)
        The rows, centred.

    Returns
    -------
    T, Q : ndarray of shape (n_components,)
        Responsibility totals and the totals of their squares.
    M : ndarray of shape (n_components, n_features)
        ``resp_kn @ Xc``.
    """
    return (resp_kn.sum(axis=1), np.einsum("kn,kn->k", resp_kn, resp_kn), resp_kn @ Xc)


def _log_determinants(mats: np.ndarray):
    """Which of a stack of covariances are positive definite, and their log
    determinants (``nan`` where not), from one batched Cholesky when all are (the
    usual case). The factorisation reads the lower triangles: the sums' moments are
    symmetric by construction."""
    sym = mats
    try:
        chol = np.linalg.cholesky(sym)
        positive = np.ones(len(mats), dtype=bool)
    except np.linalg.LinAlgError:
        positive = np.all(np.linalg.eigvalsh(sym) > 0, axis=1)
        chol = np.full_like(sym, np.nan)
        if positive.any():
            chol[positive] = np.linalg.cholesky(sym[positive])
    diag = np.diagonal(chol, axis1=1, axis2=2)
    with np.errstate(invalid="ignore"):
        return positive, 2.0 * np.sum(np.log(diag), axis=1)


def projected_covariances(covs: np.ndarray, covariance: str) -> np.ndarray:
    """Full window covariances as the model's covariance type sees them.

    Parameters
    ----------
    covs : ndarray of shape (n, d, d)
    covariance : {"full", "diag", "spherical"}

    Returns
    -------
    ndarray of shape (n, d, d)
        ``covs`` (full), their diagonals (diag), or the mean variance times the
        identity (spherical).
    """
    d = covs.shape[-1]
    diag = np.diagonal(covs, axis1=1, axis2=2)
    if covariance == "diag":
        return diag[:, :, None] * np.eye(d)
    if covariance == "spherical":
        return diag.mean(axis=1)[:, None, None] * np.eye(d)
    return covs


@dataclass
class WindowSums:
    """A window's sums per segment, rows in a given order of segment ids.

    Attributes
    ----------
    T, Q : ndarray of shape (n_components,)
    M : ndarray of shape (n_components, n_features)
    S : ndarray of shape (n_components, n_features, n_features)
    miss, miss2, imputed : ndarray of shape (n_components, n_features) or None
        Only when some row of the window missed a feature.
    B : ndarray of shape (n_components,) or None
        What ``M`` and ``S`` divide by when their rows were weighted
        (:mod:`shoal.core.piece_moments`); None: ``T``.
    """

    T: np.ndarray
    Q: np.ndarray
    M: np.ndarray
    S: np.ndarray
    miss: np.ndarray | None = None
    miss2: np.ndarray | None = None
    imputed: np.ndarray | None = None
    B: np.ndarray | None = None

    @property
    def mass(self) -> np.ndarray:
        """The totals the moments ``M`` and ``S`` divide by (``B``, else ``T``)."""
        return self.T if self.B is None else self.B


@dataclass
class SegmentStatistics:
    """One window's statistics for every baseline segment (arrays over the baseline's
    segments; ``nan`` where a statistic is not measured).

    Attributes
    ----------
    share : ndarray of shape (K,)
        Each segment's share of the window's rows.
    weight_change, weight_noise : ndarray of shape (K,)
    low : ndarray of bool, shape (K,)
        Segments whose share is under ``min_share`` times their baseline weight: their
        shape statistics count as 0 (not crossing).
    seen : ndarray of bool, shape (K,)
        Segments measured for their shape (not ``low``, with rows).
    n_eff : ndarray of shape (K,)
        Kish's effective rows (0 where not ``seen``).
    means : ndarray of shape (K, n_features)
    covs : ndarray of shape (K, n_features, n_features)
        The window's weighted means (data units) and covariances where ``seen``.
    mean_shift, mean_shift_noise, t2 : ndarray of shape (K,)
        Mahalanobis distance of the mean under the baseline covariance, its noise,
        and Hotelling's ``T^2 = n_eff d^2``.
    spread, spread_noise : ndarray of shape (K,)
        ``|log |S_window| - log |S_ref|| / (2 D)`` of the covariance type's projection,
        where it has enough rows and is positive definite, and its noise.
    missing : ndarray of bool, shape (K,)
        Segments measured for ``missing_share`` (any rows).
    missing_share, missing_noise : ndarray of shape (K,)
        The largest change over the features of the share of rows that missed one.
    missing_feature : ndarray of int, shape (K,)
        The feature of that change.
    missing_shares, missing_baseline : ndarray of shape (K, n_features)
    feature_shift, feature_noise : ndarray of shape (K, n_features) or None
        Each feature's mean over the rows that observed it, in baseline sds (when asked).
    """

    share: np.ndarray
    weight_change: np.ndarray
    weight_noise: np.ndarray
    low: np.ndarray
    seen: np.ndarray
    n_eff: np.ndarray
    means: np.ndarray
    covs: np.ndarray
    mean_shift: np.ndarray
    mean_shift_noise: np.ndarray
    t2: np.ndarray
    spread: np.ndarray
    spread_noise: np.ndarray
    missing: np.ndarray
    missing_share: np.ndarray
    missing_noise: np.ndarray
    missing_feature: np.ndarray
    missing_shares: np.ndarray
    missing_baseline: np.ndarray
    feature_shift: np.ndarray | None = None
    feature_noise: np.ndarray | None = None

    def rows(self, lo: int, hi: int) -> "SegmentStatistics":
        """The statistics of rows ``lo:hi`` (one window of several).

        Parameters
        ----------
        lo, hi : int

        Returns
        -------
        SegmentStatistics
        """
        return SegmentStatistics(**{f.name: (None if getattr(self, f.name) is None
                                             else getattr(self, f.name)[lo:hi])
                                    for f in fields(self)})


def _missing(sums: WindowSums, ref_n_eff, baseline_shares):
    T, Q = sums.T, sums.Q
    K, d = sums.M.shape
    measured = (T > 0.0) & (Q > 0.0)
    safe_T = np.where(measured, T, 1.0)
    shares = sums.miss / safe_T[:, None] if sums.miss is not None else np.zeros((K, d))
    diff = np.abs(shares - baseline_shares)
    j = np.argmax(diff, axis=1)
    rows = np.arange(K)
    n_eff = safe_T * safe_T / np.where(measured, Q, 1.0)
    p = 0.5 * (shares[rows, j] + baseline_shares[rows, j])
    inv_ref = np.where(np.isfinite(ref_n_eff), 1.0 / ref_n_eff, 0.0)
    noise = np.sqrt(np.maximum(p * (1.0 - p), 0.0) * (1.0 / n_eff + inv_ref))
    value = np.where(measured, diff[rows, j], np.nan)
    return measured, value, np.where(measured, noise, np.nan), j, shares


def _observed_means(sums: WindowSums, at, center, means, n_effs):
    """Each feature's mean over the rows that observed it and those rows' Kish count."""
    if sums.miss is None:
        return means, np.repeat(n_effs[:, None], means.shape[1], axis=1)
    T = sums.T[at, None] - sums.miss[at]
    Q = sums.Q[at, None] - sums.miss2[at]
    # rows with gaps enter unweighted (1 per unit of responsibility), as B counts them
    B = sums.mass[at, None] - sums.miss[at]
    seen = (T > 0.0) & (B > 0.0)
    M = sums.M[at] - sums.imputed[at]
    fmeans = np.where(seen, center + M / np.where(seen, B, 1.0), means)
    f_neff = np.where(seen & (Q > 0.0), T * T / np.where(Q > 0.0, Q, 1.0), 0.0)
    return fmeans, f_neff


def stack_sums(windows) -> WindowSums:
    """Several windows' sums (each in the baseline's order of segment ids) as one
    :class:`WindowSums` of ``len(windows) * K`` rows, window after window.

    Parameters
    ----------
    windows : sequence of WindowSums

    Returns
    -------
    WindowSums
    """
    def cat(name):
        parts = [getattr(w, name) for w in windows]
        if all(p is None for p in parts):
            return None
        like = next(p for p in parts if p is not None)
        return np.concatenate([np.zeros_like(like) if p is None else p for p in parts])
    out = WindowSums(**{name: cat(name) for name in
                        ("T", "Q", "M", "S", "miss", "miss2", "imputed")})
    if any(w.B is not None for w in windows):
        out.B = np.concatenate([w.mass for w in windows])
    return out


def _shapes(sums: WindowSums, B, centers, center, seen, at, ref, factors, kk):
    """The seen rows' means, covariances (NaN elsewhere) and mean shifts; for the rows
    ``at`` (the seen ones) the log-determinants of the covariances as the model's type
    sees them, and whether every variance is positive and that covariance positive
    definite."""
    n, d = sums.M.shape
    every = at.size == n          # the usual case: slices, no gathers
    pick = slice(None) if every else at
    B_at = B[pick]
    dev = sums.M[pick] / B_at[:, None]
    means = np.full((n, d), np.nan)
    means[pick] = center[pick] + dev
    cov_at = sums.S[pick] / B_at[:, None, None]
    cov_at -= dev[:, :, None] * dev[:, None, :]
    if every:
        covs = cov_at
    else:
        covs = np.full((n, d, d), np.nan)
        covs[pick] = cov_at
    shift = np.full(n, np.nan)
    if not at.size:
        return means, covs, shift, np.empty(0), np.empty(0, dtype=bool)
    shift[at] = factors.mahalanobis(means[pick], kk[at])
    diag = np.diagonal(cov_at, axis1=1, axis2=2)
    positive, log_det = _log_determinants(projected_covariances(cov_at, ref.covariance))
    return means, covs, shift, log_det, np.all(diag > 0, axis=1) & positive


_KIND = {"full": 0, "diag": 1, "spherical": 2}


def _compiled_shapes(sums: WindowSums, B, centers, center, seen, at, ref, factors, kk):
    """:func:`_shapes` in one compiled pass (a Cholesky factor per full covariance)."""
    n, d = sums.M.shape
    means, covs = np.empty((n, d)), np.empty((n, d, d))
    shift, log_det, ok = np.empty(n), np.empty(n), np.empty(n, dtype=bool)
    fused.kernels().window_shapes(
        np.ascontiguousarray(sums.S, dtype=np.float64),
        np.ascontiguousarray(sums.M, dtype=np.float64),
        np.ascontiguousarray(B, dtype=np.float64), np.ascontiguousarray(centers),
        np.ascontiguousarray(seen, dtype=bool), _KIND[ref.covariance],
        np.ascontiguousarray(factors.means, dtype=np.float64),
        np.ascontiguousarray(factors.inv_chol, dtype=np.float64),
        means, covs, shift, log_det, ok)
    return means, covs, shift, log_det[at], ok[at]


def window_statistics(ref, factors, n_rows, sums: WindowSums, centers, *,
                      min_share: float, baseline_missing=None,
                      feature_shift: bool = False,
                      ref_spread_variance=None) -> SegmentStatistics:
    """Compare one or several windows with the baseline, every segment of every window
    at once.

    Parameters
    ----------
    ref : Baseline
    factors : GaussianSet
        The baseline's Gaussians, factorised (:class:`shoal.core.distances.GaussianSet`).
    n_rows : sequence of int, length W
        Rows of each window.
    sums : WindowSums
        The windows' sums, ``W * K`` rows, each window's in the baseline's order of
        segment ids (zeros for a segment without rows; :func:`stack_sums`).
    centers : ndarray of shape (W, n_features)
        The centre each window's rows were taken from.
    min_share : float
        A segment whose share is under this fraction of its baseline weight is not
        measured for its shape (its rows are mostly its neighbours' tails).
    baseline_missing : ndarray of shape (K, n_features), optional
        The baseline's share of each segment's rows that missed each feature (zeros);
        the same for every window.
    feature_shift : bool, default False
        Also each feature's mean shift.
    ref_spread_variance : ndarray of shape (K,), optional
        ``spread_variance(ref.n_eff, D, ref.covariance)``, when the caller keeps it
        for the baseline's life (it is the same for every window).

    Returns
    -------
    SegmentStatistics
        Fields of ``W * K`` rows, window after window (:meth:`SegmentStatistics.rows`
        gives one window's).
    """
    d = ref.means.shape[1]
    K = ref.ids.shape[0]
    W = len(n_rows)
    kk = np.tile(np.arange(K), W)            # the baseline segment of each row
    n_rows = np.repeat(np.asarray(n_rows, dtype=np.float64), K)
    center = np.repeat(np.asarray(centers, dtype=np.float64), K, axis=0)
    T, Q, B = sums.T, sums.Q, sums.mass
    share = T / n_rows
    w_ref = ref.weights[kk]
    w_noise = np.atleast_1d(weight_noise(w_ref, n_rows, ref.total_n_eff))
    low = share < min_share * w_ref
    seen = ~low & (T > 0.0) & (Q > 0.0) & (B > 0.0)
    at = np.flatnonzero(seen)
    n = W * K
    n_eff = np.zeros(n)
    n_eff[at] = T[at] * T[at] / Q[at]
    shape = _compiled_shapes if fused.enabled() else _shapes
    means, covs, shift, log_det, shaped = shape(sums, B, np.asarray(centers, dtype=np.float64),
                                                center, seen, at, ref, factors, kk)
    shift_noise = np.full(n, np.nan)
    spread = np.full(n, np.nan)
    spread_n = np.full(n, np.nan)
    f_shift = f_noise = None
    if at.size:
        member = kk[at]
        ref_n = ref.n_eff[member]
        shift_noise[at] = np.atleast_1d(mean_shift_noise(n_eff[at], d, ref_n))
        usable = (n_eff[at] > d + 1) & shaped
        if usable.any():
            log_ratio = log_det[usable] - factors.log_det[member[usable]]
            if ref_spread_variance is None:
                noise = np.atleast_1d(spread_noise(n_eff[at][usable], d, ref.covariance,
                                                   ref_n[usable]))
            else:
                noise = np.sqrt(spread_variance(n_eff[at][usable], d, ref.covariance)
                                + ref_spread_variance[member[usable]])
            spread[at[usable]] = np.abs(log_ratio) / (2 * d)
            spread_n[at[usable]] = noise / (2 * d)
        if feature_shift:
            ref_sd = np.sqrt(np.diagonal(ref.covariances[member], axis1=1, axis2=2))
            fmeans, f_neff = _observed_means(sums, at, center[at], means[at], n_eff[at])
            z = np.abs(fmeans - ref.means[member]) / ref_sd
            inv_ref = np.where(np.isinf(ref_n), 0.0, 1.0 / ref_n)
            with np.errstate(divide="ignore"):
                fn = np.sqrt(1.0 / f_neff + inv_ref[:, None])
            f_shift = np.full((n, d), np.nan)
            f_noise = np.full((n, d), np.nan)
            f_shift[at] = np.where(f_neff > 0.0, z, np.nan)
            f_noise[at] = np.where(f_neff > 0.0, fn, np.nan)
    baseline_missing = np.zeros((K, d)) if baseline_missing is None else baseline_missing
    missing, m_value, m_noise, m_feature, m_shares = _missing(sums, ref.n_eff[kk],
                                                              baseline_missing[kk])
    return SegmentStatistics(
        share=share, weight_change=np.abs(share - w_ref), weight_noise=w_noise, low=low,
        seen=seen, n_eff=n_eff, means=means, covs=covs, mean_shift=shift,
        mean_shift_noise=shift_noise, t2=n_eff * shift ** 2, spread=spread,
        spread_noise=spread_n, missing=missing, missing_share=m_value,
        missing_noise=m_noise, missing_feature=m_feature, missing_shares=m_shares,
        missing_baseline=baseline_missing[kk], feature_shift=f_shift, feature_noise=f_noise)


def fit_statistics(ref_log_density: float, n_rows: int, ld_sum: float, ld2_sum: float):
    """``fit_drop`` of a window from its log-density sums, with its standard error.

    Parameters
    ----------
    ref_log_density : float
        The baseline's mean log-density per row.
    n_rows : int
        Rows of the window.
    ld_sum, ld2_sum : float
        Sums of the rows' log-densities and of their squares.

    Returns
    -------
    (value, noise, mean) : tuple of float, or None
        ``ref_log_density - mean`` (nats per row; positive when the rows fit worse),
        ``sd / sqrt(n_rows)`` with the sample sd (``n - 1``), and the window's mean;
        None below 2 rows or without a baseline level.
    """
    n = n_rows
    if n < 2 or not math.isfinite(ref_log_density):
        return None
    mean_ld = ld_sum / n
    var = max(ld2_sum / n - mean_ld * mean_ld, 0.0) * n / (n - 1)
    return ref_log_density - mean_ld, math.sqrt(var / n), mean_ld
