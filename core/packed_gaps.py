"""Rows with missing values laid out for the compiled kernels (core/_kernels_gaps.h).

:func:`pack` lists a batch's rows with gaps, their missing features by offsets, and room
for the E-step's pieces; :class:`Bound` ties them to one parameter set's precision for
a span of rows, and :func:`shoal.core.fused.compiled_span` calls its methods block by
block: mend the design rows, correct the log-joint, amend the M-step's products.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .covariance import LOG_2PI
from .errors import ModelError
from .missing import precision_matrices

__all__ = ["KIND", "Packed", "pack", "Bound"]

KIND = {"full": 0, "diag": 1, "spherical": 2}   # the kernels' covariance codes


@dataclass(frozen=True)
class Packed:
    """Gaps laid out for the compiled kernels (``gap_log_joint``, ``gap_moments`` in
    core/_kernels_gaps.h): the rows, their missing features by offsets, and room for the
    E-step's steps and conditional covariances.

    Attributes
    ----------
    rows : ndarray of shape (n_gappy,)
        int64, increasing.
    off : ndarray of shape (n_gappy + 1,)
        int64: row ``g`` misses ``cols[off[g]:off[g+1]]``.
    cols : ndarray of shape (off[-1],)
        int64.
    hoff : ndarray of shape (n_gappy + 1,)
        int64: offsets of each row's ``H^-1`` (per component).
    step : ndarray of shape (n_components * off[-1],)
    hinv : ndarray of shape (n_components * hoff[-1],)
    """

    rows: np.ndarray     # (n_gappy,) int64, increasing
    off: np.ndarray      # (n_gappy + 1,) int64: row g misses cols[off[g]:off[g+1]]
    cols: np.ndarray     # (off[-1],) int64
    hoff: np.ndarray     # (n_gappy + 1,) int64: offsets of each row's H^-1 / K
    step: np.ndarray     # (K * off[-1],)
    hinv: np.ndarray     # (K * hoff[-1],)


def pack(gaps, covariance: str, n_components: int) -> Packed:
    """The gaps laid out for the compiled kernels.

    Parameters
    ----------
    gaps : Gaps
        Where the rows have missing values (:class:`shoal.core.missing.Gaps`).
    covariance : str
        The mixture's covariance type.
    n_components : int

    Returns
    -------
    packed : Packed
    """
    if gaps.off is not None:
        off, cols = gaps.off, gaps.cols
        count = np.diff(off)
    else:
        count = gaps.mask.sum(axis=1).astype(np.int64)
        off = np.zeros(len(gaps) + 1, dtype=np.int64)
        np.cumsum(count, out=off[1:])
        cols = np.nonzero(gaps.mask)[1].astype(np.int64)
    hoff = off
    if covariance == "full":
        hoff = np.zeros_like(off)
        np.cumsum(count * count, out=hoff[1:])
    return Packed(gaps.rows.astype(np.int64), off, cols, hoff,
                  np.empty(n_components * int(off[-1])), np.empty(n_components * int(hoff[-1])))


class Bound:
    """:class:`Packed` gaps with one parameter set's precision, for one span of rows.

    Parameters
    ----------
    packed : Packed
    model : Mixture
        The parameters in force.
    data_units : bool
        Whether the rows are in the data's own units (else standardised).
    kern : module
        The compiled kernels.
    """

    __slots__ = ("packed", "kind", "lam", "lam_mu", "half_const", "log_scale", "kern",
                 "_block")

    def __init__(self, packed: Packed, model, data_units: bool, kern):
        self.packed, self.kern = packed, kern
        self.kind = KIND[model.covariance]
        D = model.n_features
        if model.covariance == "full":
            self.lam, self.lam_mu = (np.ascontiguousarray(a) for a in precision_matrices(model))
        else:
            prec = model.prec_chol ** 2
            self.lam = np.ascontiguousarray(np.broadcast_to(
                prec[:, None] if prec.ndim == 1 else prec, (model.n_components, D)))
            self.lam_mu = np.ascontiguousarray(model.means)
        diag = self.lam if self.lam.ndim == 2 else np.diagonal(self.lam, axis1=1, axis2=2)
        # a feature missing alone: 0.5 (log 2 pi - log Lam_jj) of the correction
        self.half_const = 0.5 * (LOG_2PI - np.log(diag))
        self.log_scale = np.log(model.scale) if data_units else np.zeros(D)
        self._block = (None, 0, 0)

    def _range(self, lo, hi):
        """The gappy rows of block ``lo:hi`` (found once per block)."""
        if self._block[0] != (lo, hi):
            a, b = np.searchsorted(self.packed.rows, [lo, hi])
            self._block = ((lo, hi), int(a), int(b))
        return self._block[1], self._block[2]

    def fix(self, A, lo):
        """Mend the design rows as if the missing values were at the centre (the design
        kernel wrote NaN there).

        Parameters
        ----------
        A : ndarray of shape (n_rows, width)
            Design rows of the span's rows ``lo .. lo + n_rows``; changed in place.
        lo : int
        """
        ga, gb = self._range(lo, lo + A.shape[0])
        if ga < gb:
            p = self.packed
            self.kern.gap_fix(A, lo, p.rows, p.off, p.cols, ga, gb, self.kind)

    def log_joint(self, A, lo, L):
        """Correct the log-joint of a block's rows with gaps to their marginals.

        Parameters
        ----------
        A : ndarray of shape (n_rows, width)
            The block's design rows, from row ``lo``.
        lo : int
        L : ndarray of shape (n_components, n_samples)
            The log-joint of all the span's rows; changed in place.
        """
        ga, gb = self._range(lo, lo + A.shape[0])
        if ga == gb:
            return
        p = self.packed
        if not self.kern.gap_log_joint(A, lo, L, p.rows, p.off, p.cols, p.hoff, ga, gb,
                                       self.lam, self.lam_mu, self.half_const,
                                       self.log_scale, self.kind, p.step, p.hinv):
            raise ModelError("a component's precision is not positive definite on the "
                             "missing features; raise reg_covar")

    def moments(self, A, lo, R, row_w, floor, P):
        """Add what completing the block's rows with gaps adds to the design products.

        Parameters
        ----------
        A : ndarray of shape (n_rows, width)
            The block's design rows, from row ``lo``.
        lo : int
        R : ndarray of shape (n_components, n_samples)
            Responsibilities.
        row_w : ndarray of shape (n_rows,)
            The block's row weights.
        floor : float
            Responsibilities under it count as zero.
        P : ndarray of shape (n_components, width, width) or (n_components, width)
            The products of weights and design; changed in place.
        """
        ga, gb = self._range(lo, lo + A.shape[0])
        if ga == gb:
            return
        p = self.packed
        self.kern.gap_moments(A, lo, R, row_w, floor, p.rows, p.off, p.cols, p.hoff, ga, gb,
                              p.step, p.hinv, self.kind, P)


