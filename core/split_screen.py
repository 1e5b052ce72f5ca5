"""A cheap screen for a split: the BIC gain of two Gaussians over one along a sample's
two main axes (used by the warm-up's final check and by the lifecycle's split test)."""
from __future__ import annotations

import numpy as np

__all__ = ["hard_split_gain"]


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
    if n < 12:
        return -np.inf
    centred = X - X.mean(axis=0)
    _, vectors = np.linalg.eigh(centred.T @ centred / n)
    least = max(5, n // 20)
    best = -np.inf
    for axis in vectors[:, -min(2, d):].T:
        y = np.sort(centred @ axis)
        c1, c2 = np.cumsum(y), np.cumsum(y * y)
        left = np.arange(1, n, dtype=np.float64)
        right = n - left
        var_l = c2[:-1] / left - (c1[:-1] / left) ** 2
        var_r = (c2[-1] - c2[:-1]) / right - ((c1[-1] - c1[:-1]) / right) ** 2
        total = c2[-1] / n - (c1[-1] / n) ** 2
        ok = (left >= least) & (right >= least) & (var_l > 0) & (var_r > 0)
        if not ok.any() or total <= 0:
            continue
        two = (-0.5 * (left[ok] * np.log(var_l[ok]) + right[ok] * np.log(var_r[ok]))
               + left[ok] * np.log(left[ok] / n) + right[ok] * np.log(right[ok] / n))
        best = max(best, float(two.max()) + 0.5 * n * np.log(total))
    return best - 1.5 * np.log(n)
