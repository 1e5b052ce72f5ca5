"""What the segment watch keeps of a learned piece's scores, in one pass.

After each learned piece the drift watch adds the rows' log-densities (and their
squares) to its window and counts the unusual rows (under the unusual-row
threshold: how many, per component, and the sum of their rows centred on the
model's centre); the lifecycle counts the components of every ``stride``-th row
(its split tests' samples) and keeps aside the rows under a log-density bound (those
that may be unexplained, :func:`shoal.core.unexplained.unexplained_below`). With the
compiled kernels (:mod:`shoal.core.fused`) that is one loop over the piece; without
them, numpy calls give the same tallies up to the order of the floating-point sums.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from . import fused

__all__ = ["PieceTallies", "piece_tallies"]


@dataclass
class PieceTallies:
    """A piece's tallies (:func:`piece_tallies`).

    Attributes
    ----------
    ld_sum, ld2_sum : float
        Sums of the rows' log-densities and of their squares.
    unusual : int
        Rows under the unusual bound.
    unusual_sum : ndarray of shape (n_features,)
        The sum of those rows, centred.
    unusual_by : ndarray of int64, shape (n_components,)
        Those rows per component.
    near : ndarray of int64
        Positions (ascending) of the rows under the near bound.
    sampled : ndarray of int64, shape (n_components,)
        Rows ``first, first + stride, ...`` per component.
    sample_rows : ndarray of float32, shape (n_sampled, n_features), or None
        Those rows, rounded to float32 (when asked for).
    sample_ld : ndarray of shape (n_sampled,) or None
        Their log-densities.
    """

    ld_sum: float
    ld2_sum: float
    unusual: int
    unusual_sum: np.ndarray
    unusual_by: np.ndarray
    near: np.ndarray
    sampled: np.ndarray
    sample_rows: np.ndarray | None = None
    sample_ld: np.ndarray | None = None


def piece_tallies(log_density, component, X, center, n_components: int, *,
                  unusual_below: float | None = None, near_below: float | None = None,
                  first: int = 0, stride: int = 1, sample: bool = False) -> PieceTallies:
    """Tally a learned piece's scores for the segment watch.

    Parameters
    ----------
    log_density : ndarray of shape (n_samples,)
        The rows' log-densities (data units, ``Scores.log_density``).
    component : ndarray of int, shape (n_samples,)
        Each row's most responsible component.
    X : ndarray of shape (n_samples, n_features)
        The rows, data units (NaN where a value is missing).
    center : ndarray of shape (n_features,)
        What the unusual rows' sum is centred on; a missing value counts at the centre
        (as the drift watch's window sums fill it).
    n_components : int
    unusual_below, near_below : float or None
        Rows whose log-density is under the bound are counted as unusual, or listed as
        near; None: no row.
    first, stride : int
        The rows whose components are counted in ``sampled``.
    sample : bool, default False
        Also copy those rows out (float32) with their log-densities.

    Returns
    -------
    PieceTallies
    """
    n, d = X.shape
    ub = math.nan if unusual_below is None else float(unusual_below)
    nb = math.nan if near_below is None else float(near_below)
    unusual_sum = np.zeros(d)
    unusual_by = np.zeros(n_components, dtype=np.int64)
    sampled = np.zeros(n_components, dtype=np.int64)
    picked = len(range(first, n, stride))
    rows_out = np.empty((picked, d), dtype=np.float32) if sample else None
    ld_out = np.empty(picked) if sample else None
    if fused.enabled():
        near = np.empty(n, dtype=np.int64)
        ld_sum, ld2_sum, unusual, n_near = fused.kernels().piece_tallies(
            np.ascontiguousarray(log_density, dtype=np.float64),
            np.ascontiguousarray(component, dtype=np.int64),
            np.ascontiguousarray(X, dtype=np.float64),
            np.ascontiguousarray(center, dtype=np.float64), ub, nb, int(first), int(stride),
            unusual_sum, unusual_by, sampled, near, rows_out, ld_out)
        return PieceTallies(ld_sum, ld2_sum, unusual, unusual_sum, unusual_by, near[:n_near],
                            sampled, rows_out, ld_out)
    log_density = np.asarray(log_density, dtype=np.float64)
    rows = np.flatnonzero(log_density < ub)
    if rows.size:
        centred = X.take(rows, axis=0) - np.asarray(center)
        unusual_sum += np.where(np.isnan(centred), 0.0, centred).sum(axis=0)
        unusual_by += np.bincount(component.take(rows), minlength=n_components)
    sampled += np.bincount(component[first::stride], minlength=n_components)
    if sample:
        rows_out[:] = X[first::stride]
        ld_out[:] = log_density[first::stride]
    return PieceTallies(float(log_density.sum()), float(np.dot(log_density, log_density)),
                        int(rows.size), unusual_sum, unusual_by,
                        np.flatnonzero(log_density < nb).astype(np.int64), sampled, rows_out,
                        ld_out)
