"""Finding the missing values (NaN) in a block of rows, and the error that sends a
mixture's method looking for them.

A NaN in the rows given to a mixture marks a missing feature; an infinity is refused.
The complete-row paths raise :class:`MissingValues` when a value is not finite, and the
mixture's public methods catch it, find the gaps (:func:`find`) and start again.
"""

from __future__ import annotations

import numpy as np

from .errors import ModelError

__all__ = ["MissingValues", "not_finite", "NOT_FINITE", "Gaps", "find", "fill"]

_INFINITE = ("X contains infinite values; drop or mark those rows first (NaN marks a "
             "missing feature)")
NOT_FINITE = "X contains NaN or infinite values; drop or mark those rows first"


class MissingValues(ModelError):
    """Raised by the complete-row paths when a row holds NaN or an infinity; the
    mixture's public methods catch it and start again with the rows' gaps marked. A
    :class:`ModelError`, so that a path that does not handle gaps refuses them."""


def not_finite() -> ModelError:
    """The error for rows with a non-finite value.

    Returns
    -------
    error : MissingValues
    """
    return MissingValues(NOT_FINITE)


class Gaps:
    """Where a block of rows has missing features.

    Attributes
    ----------
    rows : ndarray of shape (n_gappy,)
        Increasing indices of the rows with at least one missing feature.
    mask : ndarray of shape (n_gappy, n_features)
        True where that row's feature is missing (made on first use when the gaps were
        given as ``off`` and ``cols``: row ``g`` misses ``cols[off[g]:off[g+1]]``).
    values : ndarray of shape (n_gappy, n_features) or None
        A copy of those rows (NaN where missing) when :func:`find` had one at hand,
        for the numpy path to standardise in place rather than copy the rows again.
    prepared : tuple or None
        What the numpy path worked out from these gaps for one batch of rows, kept
        for its spans (:func:`shoal.core.gap_spans.batch_layout`).
    """

    __slots__ = ("rows", "_mask", "off", "cols", "n_features", "values", "prepared")

    def __init__(self, rows, mask=None, *, off=None, cols=None, n_features=None,
                 values=None):
        self.rows, self._mask = rows, mask
        self.off, self.cols, self.n_features = off, cols, n_features
        self.values, self.prepared = values, None

    @property
    def mask(self) -> np.ndarray:
        """ndarray of shape (n_gappy, n_features): True where a feature is missing."""
        if self._mask is None:
            mask = np.zeros((len(self), self.n_features), dtype=bool)
            mask[np.repeat(np.arange(len(self)), np.diff(self.off)), self.cols] = True
            self._mask = mask
        return self._mask

    def within(self, lo: int, hi: int) -> "Gaps":
        """The gaps of rows ``lo:hi``, indexed from ``lo``.

        Parameters
        ----------
        lo, hi : int

        Returns
        -------
        gaps : Gaps
        """
        a, b = np.searchsorted(self.rows, [lo, hi])
        if self._mask is not None:
            return Gaps(self.rows[a:b] - lo, self._mask[a:b])
        return Gaps(self.rows[a:b] - lo, off=self.off[a:b + 1] - self.off[a],
                    cols=self.cols[self.off[a]:self.off[b]], n_features=self.n_features)

    def __len__(self) -> int:
        return int(self.rows.shape[0])


def find(X, kern=None) -> Gaps | None:
    """Where ``X`` has NaN.

    One pass finds the rows to look at: the compiled ``kern.gap_index`` if given,
    else the row sums (a NaN or an infinity makes the sum non-finite). Infinite
    values are not missing: they raise :class:`ModelError`.

    Parameters
    ----------
    X : ndarray of shape (n_samples, n_features)
        float64 rows.
    kern : module or None
        The compiled kernels.

    Returns
    -------
    gaps : Gaps or None
        None if no value is missing.
    """
    if kern is not None and X.flags.c_contiguous:
        n, D = X.shape
        rows, off = np.empty(n, dtype=np.int64), np.empty(n + 1, dtype=np.int64)
        cols = np.empty(n * D, dtype=np.int64)
        count = kern.gap_index(X, rows, off, cols)
        if count < 0:
            raise ModelError(_INFINITE)
        if count == 0:
            return None
        return Gaps(rows[:count], off=off[: count + 1], cols=cols[: off[count]],
                    n_features=D)
    # a product with ones sums each row in one BLAS pass (NaN and infinities carry)
    suspect = np.flatnonzero(~np.isfinite(X @ np.ones(X.shape[1])))
    if suspect.size == 0:
        return None
    sub = np.take(X, suspect, axis=0)
    if np.isinf(sub).any():
        raise ModelError(_INFINITE)
    nan = np.isnan(sub)
    # the others only overflowed their sum: finite rows (a count in bytes by one
    # product is several times quicker than any() along rows this short)
    keep = (nan.view(np.uint8) @ np.ones(X.shape[1], np.uint8) > 0 if X.shape[1] < 256
            else nan.any(axis=1))
    if keep.all():
        return Gaps(suspect, nan, values=sub)
    if not keep.any():
        return None
    return Gaps(suspect[keep], nan[keep], values=sub[keep])


def fill(X, center, gaps: Gaps) -> np.ndarray:
    """A copy of ``X`` with its missing values at the feature's ``center``.

    Parameters
    ----------
    X : ndarray of shape (n_samples, n_features)
    center : ndarray of shape (n_features,)
    gaps : Gaps
        Where ``X`` has NaN.

    Returns
    -------
    filled : ndarray of shape (n_samples, n_features)
    """
    filled = X.copy()
    filled[gaps.rows] = np.where(gaps.mask, center, X[gaps.rows])
    return filled
