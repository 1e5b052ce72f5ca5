"""A cheap screen for a split: the BIC gain of two Gaussians over one along a sample's
two main axes (used by the warm-up's final check and by the lifecycle's split test)."""
from __future__ import annotations

import functools
import math

import numpy as np
from scipy.linalg import lapack

__all__ = ["hard_split_gain"]


def _main_axes(scatter, k: int):
    """The ``k`` largest eigenvalues (ascending) of a symmetric matrix and their
    eigenvectors (columns): LAPACK's ``dsyevr`` computes those alone (``eigh`` all of
    them, if it fails)."""
    d = scatter.shape[0]
    values, vectors, found, _, info = lapack.dsyevr(scatter, range="I", il=d - k + 1, iu=d)
    if info == 0 and found == k:
        return values[:k], vectors[:, :k]
    values, vectors = np.linalg.eigh(scatter)
    return values[-k:], vectors[:, -k:]


@functools.lru_cache(maxsize=16)
def _cuts(n: int, least: int):
    """Rows left and right of each cut that leaves ``least`` or more on either side, and
    twice the classification log-likelihood's terms that depend on the cut alone,
    ``3 (l log l + r log r) - 2 n log n`` (read-only: the same for every sample of ``n``
    rows)."""
    left = np.arange(least, n - least + 1, dtype=np.float64)
    right = n - left
    const = 3.0 * (left * np.log(left) + right * np.log(right)) - 2.0 * n * np.log(n)
    for a in (left, right, const):
        a.flags.writeable = False
    return left, right, const


def hard_split_gain(X, rng=None) -> float:
    """BIC gain of two Gaussians over one along the rows' two main axes.

    A cheap screen before an EM fit of two components: the best cut of each axis is
    scored as a classification likelihood. Rows are projected on the two leading
    eigenvectors of their covariance; along each, every cut of the sorted values into a
    left and a right part is scored at once from cumulative sums (1-D 2-means done
    exactly), each part holding at least ``max(5, n / 20)`` rows. On one Gaussian the
    best cut is near the median, where each half's variance is ``1 - 2/pi`` of the
    whole: a gain of ``-log(1 - 2/pi) / 2 - log 2 = -0.19`` nats per row, below zero
    before the penalty for the three extra parameters. Two groups apart along an axis
    gain far more.

    Parameters
    ----------
    X : ndarray of shape (n_samples, n_features)
        The rows to screen (finite).
    rng : numpy.random.Generator, optional
        Unused: the screen is deterministic. Accepted so that callers can pass theirs.

    Returns
    -------
    gain : float
        Log-likelihood gain of the best cut minus the BIC penalty ``1.5 log n``; above
        zero where two Gaussians describe the rows better than one. ``-inf`` for fewer
        than 12 rows or when no axis can be cut.
    """
    n, d = X.shape
    least = max(5, n // 20)
    if n < 12 or n < 2 * least:
        return -np.inf
    centred = X - np.ones(n) @ X / n
    values, vectors = _main_axes(centred.T @ centred, min(2, d))
    # both axes at once: row a of y holds the sorted projections on axis a; the cuts
    # that leave at least `least` rows on either side are the columns lo .. hi - 1
    y = np.sort((centred @ vectors).T, axis=1)
    c1, c2 = np.cumsum(y, axis=1), np.cumsum(y * y, axis=1)
    s2 = c2[:, -1:]
    lo, hi = least - 1, n - least
    c1, c2 = c1[:, lo:hi], c2[:, lo:hi]
    left, right, const = _cuts(n, least)
    # each part's sum of squared deviations (the projections sum to zero, so the right
    # part's sum is -c1); with a part's variance v = ss / l, twice the classification
    # log-likelihood of a cut is const - (l log ss_l + r log ss_r)
    square = c1 * c1
    ss_l = c2 - square / left
    ss_r = (s2 - c2) - square / right
    with np.errstate(divide="ignore", invalid="ignore"):
        twice = const - (left * np.log(ss_l) + right * np.log(ss_r))
        best = twice.max(axis=1).tolist()
        if not all(map(math.isfinite, best)):   # a part of equal values: no cut there
            twice[~((ss_l > 0) & (ss_r > 0))] = -np.inf
            best = twice.max(axis=1).tolist()
    # one Gaussian along the axis: its variance is the axis's eigenvalue (over n)
    total = (values / n).tolist()
    gains = [0.5 * (b + n * math.log(t)) for b, t in zip(best, total)
             if t > 0 and b > -math.inf]
    return (max(gains) if gains else -math.inf) - 1.5 * math.log(n)
