"""The compiled passes of scoring and learning, and the switch between them and numpy.

The numpy path of :mod:`shoal.core.mixture` makes a dozen passes over every block of
rows after the log-joint GEMM (sum of squares, max, shift, argmax, clamp, exp, sum,
divide, log) and then, per component, a ``flatnonzero``, a gather, a weighting and a
GEMM for the statistics; each pass is a separate numpy call over the block, and a
refresh of the parameters is a few dozen small numpy and LAPACK calls. The C
extension ``shoal.core._kernels`` (core/_kernels.c) runs the passes between the BLAS
calls as a few loops over the block while it sits in the cache, gathers the rows each
component learns from for one SYRK per component, and derives a refresh's parameters
in one call. The log-joint and the softmax run in row-tiled kernels for AVX-512 or
AVX2 with FMA (picked by the CPU; elsewhere a BLAS GEMM and numpy's ``exp``); BLAS
keeps the M-step SYRKs.

The extension is built when shoal is installed (it needs a C compiler; the build is
optional). Without it, or once switched off with :func:`set_enabled` (the daemon does
so at start-up when ``SHOAL_COMPILED=0`` is in its environment; core reads none),
:func:`enabled` is false and the mixture keeps its numpy path, which gives the same
results up to the order of floating-point operations (tests compare the two).

Here too is the mixture's glue to the extension: :func:`compiled_span` scores (and
learns from) a span of rows, :func:`derive` and :func:`factor` give parameters,
:func:`scoring_operator` and :func:`packed_operator` pack them for the kernels
(:mod:`shoal.core.packed_gaps` lays out rows with missing values for them).
"""

from __future__ import annotations

import numpy as np

from .covariance import LOG_2PI, non_positive_variance, not_positive_definite
from .gaps import not_finite
from .packed_gaps import KIND, Bound

__all__ = ["enabled", "set_enabled", "kernels", "tiled", "packed_full_len", "as_c64",
           "factor", "derive", "scoring_operator", "packed_operator", "compiled_span",
           "FUSED_ROWS", "LINEAR_ROWS"]

FUSED_ROWS = 1024  # rows per block, full type: its (K*D, rows) whitened block stays in L2
LINEAR_ROWS = 4096  # the same for diag and spherical (no whitened block: fewer, longer calls)

_STATE: dict = {}


def enabled() -> bool:
    """Whether the compiled kernels are in use.

    Returns
    -------
    on : bool
        The extension is built and not switched off.
    """
    on = _STATE.get("on")
    if on is None:
        try:
            kernels()
            on = True
        except ImportError:
            on = False
        _STATE["on"] = on
    return on


def set_enabled(on: bool) -> None:
    """Switch the compiled kernels on or off in this process (tests compare both paths).

    Parameters
    ----------
    on : bool
        True raises ImportError when the extension is not built.
    """
    if on:
        kernels()   # raises ImportError without the extension
    _STATE["on"] = bool(on)


def kernels():
    """The compiled kernels.

    Returns
    -------
    kernels : module
        The extension module ``shoal.core._kernels``.
    """
    k = _STATE.get("kernels")
    if k is None:
        from . import _kernels as k
        _STATE["kernels"] = k
    return k


def tiled() -> bool:
    """Whether the log-joint runs in the extension's row-tiled kernels.

    Returns
    -------
    tiled : bool
        AVX-512 or AVX2 with FMA, picked by the CPU (``_kernels.tile_isa``); False
        means a BLAS GEMM.
    """
    return kernels().tile_isa() != "none"


def packed_full_len(n_components: int, n_features: int) -> int:
    """Length of the full type's operator packed for the tiled kernel (``pack_full``).

    The layout is the extension's own: per component and per block of 4 whitened
    coordinates, four offsets and four weights for each feature below the block's end.

    Parameters
    ----------
    n_components, n_features : int

    Returns
    -------
    length : int
    """
    return n_components * kernels().packed_len(n_features)



def as_c64(a) -> np.ndarray:
    """``a`` as a C-contiguous float64 array (the compiled kernels take no other).

    Parameters
    ----------
    a : array-like

    Returns
    -------
    array : ndarray of the same shape
    """
    return np.ascontiguousarray(a, dtype=np.float64)


# ------------------------------------------------------------------ parameters
def factor(cov):
    """Precision Cholesky factors and their log-determinants by the compiled kernel.

    Parameters
    ----------
    cov : ndarray of shape (n_components, n_features, n_features)

    Returns
    -------
    prec_chol : ndarray of shape (n_components, n_features, n_features)
        Upper triangular ``U`` with ``U U^T = cov^-1``.
    log_det : ndarray of shape (n_components,)
        ``log det U``.
    """
    cov = as_c64(cov)
    K = cov.shape[0]
    prec_chol, log_det, bad = np.zeros_like(cov), np.empty(K), np.zeros(K, dtype=np.bool_)
    kernels().full_factor(cov, prec_chol, log_det, bad)
    if bad.any():
        raise not_positive_definite(np.flatnonzero(bad).tolist())
    return prec_chol, log_det


def derive(mixture, s0, s1, s2, sumsq, tiny) -> dict:
    """Parameters from statistics by the compiled kernels, as
    :func:`shoal.core.learning.derive` gives them through numpy (a full-type refresh
    is a few dozen small numpy and LAPACK calls there, one call here).

    Parameters
    ----------
    mixture, s0, s1, s2, sumsq
        As for :func:`shoal.core.parameters.derive`.
    tiny : float
        Added to ``s0`` so that an empty component divides safely.

    Returns
    -------
    params : dict
        As :func:`shoal.core.parameters.derive` returns them.
    """
    K, D = s1.shape
    weights, means = np.empty(K), np.empty((K, D))
    if mixture.covariance != "full":
        var = np.empty((K, D) if mixture.covariance == "diag" else K)   # K from the statistics
        kern = kernels()
        run = kern.diag_derive if mixture.covariance == "diag" else kern.spherical_derive
        if not run(as_c64(s0), as_c64(s1), as_c64(s2), 1.0 / sumsq,
                   float(mixture.reg_covar), float(mixture.prior_weight), tiny,
                   weights, means, var):
            raise non_positive_variance()
        prec_chol = 1.0 / np.sqrt(var)
        return dict(weights=weights, means=means, covariances=var, prec_chol=prec_chol,
                    log_det=mixture.family.log_det(prec_chol, D))
    cov, prec_chol = np.empty((K, D, D)), np.zeros((K, D, D))
    log_det, bad = np.empty(K), np.zeros(K, dtype=np.bool_)
    kernels().full_derive(
        as_c64(s0), as_c64(s1), as_c64(s2), 1.0 / sumsq, float(mixture.reg_covar),
        float(mixture.prior_weight), tiny, weights, means, cov, prec_chol, log_det, bad)
    if bad.any():
        raise not_positive_definite(np.flatnonzero(bad).tolist())
    return dict(weights=weights, means=means, covariances=cov, prec_chol=prec_chol,
                log_det=log_det)


def scoring_operator(mixture):
    """The mixture's parameters packed for the compiled scoring kernels.

    Parameters
    ----------
    mixture : Mixture

    Returns
    -------
    operator : tuple or ndarray
        Full type: ``(WT, const)``, ``WT`` of shape (n_components * n_features,
        n_features + 1) and ``const`` (n_components, 1), as the family's operator.
        Diag and spherical: ``BT`` of shape (n_components, width).
    """
    K, D = mixture.means.shape
    if mixture.covariance == "full":
        WT = np.empty((K * D, D + 1))
        kernels().full_operator(as_c64(mixture.means), as_c64(mixture.prec_chol),
                                as_c64(mixture.log_det), WT)
        const = np.log(mixture.weights) + mixture.log_det - 0.5 * D * LOG_2PI
        return WT, const[:, None]
    BT = np.empty((K, mixture.family.width(D)))
    log_const = np.log(mixture.weights) + mixture.log_det - 0.5 * D * LOG_2PI
    kern = kernels()
    build = kern.diag_operator if mixture.covariance == "diag" else kern.spherical_operator
    build(as_c64(mixture.means), as_c64(mixture.prec_chol**2), as_c64(log_const), BT)
    return BT


def packed_operator(mixture) -> np.ndarray:
    """The full type's whitening operator packed for the tiled log-joint kernel.

    Parameters
    ----------
    mixture : Mixture

    Returns
    -------
    packed : ndarray of shape (:func:`packed_full_len`,)
    """
    WT = as_c64(mixture.scoring_operator[0])
    packed = np.empty(packed_full_len(*mixture.means.shape))
    kernels().pack_full(WT, packed)
    return packed


# --------------------------------------------------------------------- one span
def compiled_span(mixture, X, lo, hi, out, data_units=True, row_w=None, floor=0.0,
                  gaps=None, sums=None):
    """Score rows ``lo:hi`` with the compiled kernels; with ``row_w`` also learn.

    Same results as :func:`shoal.core.scoring.score_span` and
    :func:`shoal.core.scoring.accumulate` up to rounding.

    Parameters
    ----------
    mixture : Mixture
        The parameters in force for the whole span.
    X : ndarray of shape (n_samples, n_features)
        Rows in the data's own units (standardised here with the mixture's centre and
        scale) or, with ``data_units=False``, standardised rows.
    lo, hi : int
    out : ScoreBuffer
        Gets the rows' scores.
    data_units : bool
    row_w : ndarray of shape (hi - lo,) or None
        The rows' weights in the statistics; None to score only.
    floor : float
        Responsibilities under it count as zero in the statistics.
    gaps : Packed or None
        The rows with missing values: scored by their marginals and learned from by EM
        with missing data.
    sums : tuple of two ndarray of shape (n_components,), optional
        Each component's responsibilities over the rows, and their squares, are added
        to these as the responsibilities are made.

    Returns
    -------
    statistics : tuple of ndarray or None
        ``(s0, s1, s2)`` of the span weighted by ``resp * row_w``; None without
        ``row_w``.
    """
    kern = kernels()
    family = mixture.family
    K, D = mixture.n_components, mixture.n_features
    W = family.width(D)
    learn = row_w is not None
    if learn:
        row_w = as_c64(row_w)
    if hi <= lo:
        return (np.zeros_like(mixture.s0), np.zeros_like(mixture.s1),
                np.zeros_like(mixture.s2)) if learn else None
    full = mixture.covariance == "full"
    nb = min(FUSED_ROWS if full else LINEAR_ROWS, hi - lo)
    A = np.empty((nb, W))
    R = out.resp_kn
    is_tiled = tiled()
    if not is_tiled:
        top, total = np.empty(nb), np.empty(nb)
    if full:
        WT, const = mixture.scoring_operator
        const = const[:, 0].copy()
        if is_tiled:
            packed = mixture.packed_operator
        else:
            Y = np.empty((K * D, nb))
        if learn:
            P = np.zeros((K, W, W))
            if not is_tiled:
                G = np.empty((K, nb, W))
                counts = np.empty(K, dtype=np.intp)
    else:
        BT = mixture.scoring_operator
        if learn:
            P = np.zeros((K, W))
    lss = mixture.log_scale_sum
    kind = KIND[mixture.covariance]
    if data_units:
        center, scale = as_c64(mixture.center), as_c64(mixture.scale)
    else:
        center, scale = np.zeros(D), np.ones(D)
    first = 0           # row of X that row `lo` of the span is
    if gaps is not None:
        gaps = Bound(gaps, mixture, data_units, kern)
    if not X.flags.c_contiguous:
        X, first = np.ascontiguousarray(X[lo:hi]), lo
    for a in range(lo, hi, nb):
        b = min(a + nb, hi)
        m = b - a
        if not kern.design(X, a - first, m, center, scale, kind, A) and gaps is None:
            raise not_finite()
        Ab = A[:m]
        if gaps is not None:
            gaps.fix(Ab, a)     # the rows' NaN (the only non-finite values) to zero
        if is_tiled:
            kern.log_joint(Ab, packed if full else BT, const if full else None, D, R, a)
        elif full:
            Yb = Y if m == nb else np.empty((K * D, m))
            np.matmul(WT, Ab.T, out=Yb)
            kern.full_log_joint(Yb, const, D, R, a)
        else:
            np.matmul(BT, Ab.T, out=R[:, a:b])
        if gaps is not None:
            gaps.log_joint(Ab, a, R)
        if is_tiled:
            kern.softmax(R, a, m, lss, out.component, out.log_density, out.confidence,
                         *(sums or ()))
        else:
            kern.shift(R, a, m, top, out.component)
            Rb = R[:, a:b]
            np.exp(Rb, out=Rb)
            kern.normalise(R, a, m, total)
            ld = out.log_density[a:b]
            np.log(total[:m], out=ld)
            ld += top[:m]
            ld -= lss
            np.divide(1.0, total[:m], out=out.confidence[a:b])
            if sums is not None:
                totals, squares = sums
                totals += Rb.sum(axis=1)
                squares += np.einsum("kn,kn->k", Rb, Rb)
        if learn:
            wb = row_w[a - lo : b - lo]
            if full and is_tiled:
                kern.gather_syrk(Ab, R, a, wb, floor, P)
            elif full:
                kern.gather_rows(Ab, R, a, wb, floor, G, counts)
                for k in range(K):
                    c = counts[k]
                    if c:
                        Gk = G[k, :c]
                        P[k] += Gk.T @ Gk     # numpy runs A^T A as one SYRK
            else:
                kern.accumulate_rows(Ab, R, a, wb, floor, P)
            if gaps is not None:
                gaps.moments(Ab, a, R, wb, floor, P)
    return family.split_moments(P, D) if learn else None
