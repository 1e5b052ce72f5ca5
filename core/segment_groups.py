"""Groups among rows: a compact new group, a widened segment, a split in two.

The lifecycle's tests on small sets of rows (the pool of unexplained rows, a
segment's recent sample): :func:`compact_group` finds the largest compact Gaussian
group, :func:`widening_explains` asks whether widening an existing segment explains
it as well (by BIC), :func:`split_test` whether two Gaussians explain a segment's rows
better than one.
"""
from __future__ import annotations

import warnings

import numpy as np
from scipy import special

from .errors import ModelError, NotEnoughDataError
from .mixture import Mixture
from .split_screen import hard_split_gain
from .unexplained import chi2_quantile, squared_mahalanobis

__all__ = ["compact_group", "widening_explains", "split_test", "recent_share"]

_LOG_2PI = float(np.log(2.0 * np.pi))


def compact_group(X, *, min_rows, max_sd=np.inf, threshold=0.999, max_groups=3, seed=0,
                  n_init=2, reg_covar=1e-6):
    """The largest compact Gaussian group among rows, or None.

    A small batch-EM fit on the rows (1 to ``max_groups`` components, the number
    chosen by BIC, :func:`~shoal.core.warmup.select_n_components`); the heaviest
    component is then refined on the rows it explains (squared Mahalanobis distance
    under the ``threshold`` chi-square quantile), re-estimated from the three
    quarters of them nearest its centre in each round, so that scattered rows around
    it neither widen it nor pull its mean.

    Parameters
    ----------
    X : ndarray of shape (n_samples, n_features)
        Data units.
    min_rows : int
        A group must explain at least this many rows.
    max_sd : float
        ... and the geometric mean of its standard deviations, ``det(cov)^(1/2D)``,
        must not exceed this (data units).
    threshold : float
        Chi-square quantile of the squared Mahalanobis distance within which a row is
        explained by the group.
    max_groups : int
        The most components the small fit may have.
    seed, n_init : int
        Seed and number of k-means++ restarts of the small fit.
    reg_covar : float
        Added to the diagonal of the small fit's covariances.

    Returns
    -------
    group : tuple (mean, covariance, members) or None
        ``mean`` of shape (n_features,), ``covariance`` of shape (n_features,
        n_features), both in data units, and ``members`` a boolean mask of shape
        (n_samples,) of the rows the group explains.
    """
    from .warmup import select_n_components   # warmup imports this module's siblings

    X = np.asarray(X, dtype=np.float64)
    n, d = X.shape
    if n < max(int(min_rows), d + 2):
        return None
    k_max = int(max(1, min(max_groups, n // max(int(min_rows), 1))))
    try:
        with warnings.catch_warnings():   # about the pool, not the user's warm-up rows
            warnings.simplefilter("ignore", RuntimeWarning)
            fit, _ = select_n_components(X, 1, k_max, "full", seed=seed, n_init=n_init,
                                         reg_covar=reg_covar)
    except (ModelError, np.linalg.LinAlgError):   # too few or degenerate rows: no group
        return None
    bound = chi2_quantile(threshold, d)
    order = np.argsort(-fit.weights, kind="stable")
    means, covs = fit.data_means(), fit.data_covariance_matrices()
    need = max(int(min_rows), d + 2)
    for j in order:
        found = _trimmed_group(X, means[j], covs[j], bound, need, reg_covar)
        if found is not None and \
                0.5 * np.linalg.slogdet(found[1])[1] / d <= np.log(max_sd):
            return found
    return None


def _squared_distances(X, mean, cov):
    chol = np.linalg.cholesky(cov)
    white = np.linalg.solve(chol, (X - mean).T)
    return np.einsum("ij,ij->j", white, white)


def _trimmed_group(X, mean, cov, bound, need, reg_covar, keep=0.75, rounds=3):
    """Mean, covariance and members of the group around ``(mean, cov)``, robust to the
    scattered rows near it.

    Each round takes the rows within the chi-square ``bound`` and re-estimates from the
    ``keep`` share of them nearest the centre (a concentration step of FAST-MCD,
    Rousseeuw & Van Driessen 1999), the covariance scaled back to the whole Gaussian
    by ``keep / P(chi2_{D+2} <= chi2_D^{-1}(keep))`` (Croux & Haesbroeck 1999). Rows far
    from the group then no longer pull the estimate; the last round is the plain
    mean and covariance of the rows within the bound.
    """
    d = X.shape[1]
    eye = reg_covar * np.eye(d)
    cut = chi2_quantile(keep, d)
    consistency = keep / float(special.gammainc(0.5 * (d + 2), 0.5 * cut))
    try:
        for _ in range(rounds):
            d2 = _squared_distances(X, mean, cov)
            inner = np.flatnonzero(d2 <= bound)
            if inner.size < need:
                return None
            h = max(int(np.ceil(keep * inner.size)), d + 2)
            core_rows = inner[np.argsort(d2[inner], kind="stable")[:h]]
            mean = X[core_rows].mean(axis=0)
            cov = consistency * np.cov(X[core_rows], rowvar=False) + eye
        members = _squared_distances(X, mean, cov) <= bound
        if int(members.sum()) < need:
            return None
        mean = X[members].mean(axis=0)
        cov = np.cov(X[members], rowvar=False) + eye
    except np.linalg.LinAlgError:
        return None
    return mean, cov, members


def widening_explains(mixture: Mixture, X, mean, covariance, threshold: float = 0.999):
    """Whether rows are explained as well by widening an existing segment as by a new
    Gaussian group.

    Two tests, either of which gives the rows to a segment. First, a group whose
    ``threshold`` chi-square bound holds a segment's mean surrounds that segment: its
    rows are what the segment leaves unexplained after its spread grew, not a
    population of their own (a compact new group beside a segment does not reach
    back to its centre). Second, by BIC (Schwarz 1978): the new group costs ``D + D (D + 1) / 2`` free parameters; widening segment ``k``
    (its covariance times ``c >= 1``, its mean kept) costs one, with the maximum
    likelihood ``c = mean(d2_k) / D`` from the rows' squared Mahalanobis distances
    ``d2_k`` to it. A spread that grew puts the segment's rows beyond its chi-square
    bound all around it: a Gaussian fitted to that shell explains them no better than
    the widened segment, and is no new group.

    Parameters
    ----------
    mixture : Mixture
        The model whose segments may be widened.
    X : array_like of shape (n_samples, n_features)
        The group's rows, data units.
    mean, covariance : array_like of shapes (n_features,), (n_features, n_features)
        The group's Gaussian, data units.
    threshold : float
        Chi-square quantile of the squared Mahalanobis distance within which a
        segment's mean counts as inside the group (the group surrounds it).

    Returns
    -------
    widened : int or None
        The id of the segment whose widening explains the rows at least as well
        (the best one), or None when the new group wins.
    gain : float
        Log-likelihood of the group minus that of the best widened segment, minus the
        BIC penalty of the difference in parameters (> 0: the group wins); ``nan``
        when the group surrounds a segment.
    """
    X = np.asarray(X, dtype=np.float64)
    n, d = X.shape
    mean = np.asarray(mean, dtype=np.float64)
    chol = np.linalg.cholesky(np.asarray(covariance, dtype=np.float64))
    inside = np.linalg.solve(chol, (mixture.data_means() - mean).T)
    inside = np.einsum("ij,ij->j", inside, inside)          # segment means, group metric
    nearest = int(np.argmin(inside))
    if inside[nearest] <= chi2_quantile(threshold, d):
        return int(mixture.ids[nearest]), float("nan")
    d2 = squared_mahalanobis(mixture, X)                          # (n, K)
    # log |Sigma_k| in data units: -2 log det U_k (standardised) + 2 sum log scale
    log_det_cov = -2.0 * mixture.log_det + 2.0 * float(np.sum(np.log(mixture.scale)))
    c = np.maximum(d2.mean(axis=0) / d, 1.0)
    widened = -0.5 * (n * (d * _LOG_2PI + log_det_cov + d * np.log(c))
                      + d2.sum(axis=0) / c)
    white = np.linalg.solve(chol, (X - mean).T)
    group = -0.5 * (n * (d * _LOG_2PI + 2.0 * float(np.sum(np.log(np.diag(chol)))))
                    + float(np.sum(white * white)))
    extra = d + d * (d + 1) / 2 - 1
    best = int(np.argmax(widened))
    gain = float(group - widened[best] - 0.5 * extra * np.log(n))
    return (None if gain > 0 else int(mixture.ids[best])), gain


def split_test(X, *, covariance="full", min_share=0.1, min_gain=0.5, seed=0, n_init=3,
               reg_covar=1e-6):
    """Whether a segment's rows are better explained by two Gaussians than by one.

    BIC (Schwarz 1978) of a two-component fit (k-means++ restarts and batch EM,
    :func:`~shoal.core.warmup.initialise`) against one Gaussian, on the rows. The
    split is the second step of the split-and-merge EM of Ueda et al. (2000), with
    BIC in place of their local KL criterion so that the extra parameters are paid for.

    Parameters
    ----------
    X : ndarray of shape (n_samples, n_features)
        The segment's recent rows in stream order, data units. Two groups must both
        hold at least half their share among the newer half of the rows: one group
        that moved is not two.
    covariance : {"full", "diag", "spherical"}
        The mixture's covariance type (the parameter count follows it).
    min_share : float
        Each part must hold at least this share of the rows.
    min_gain : float
        ... and the BIC must fall by at least this much per row (0.5: a quarter of a
        nat per row): two groups apart enough to be segments gain several times that
        on the seeded lumped scenarios (``tests/support/_scenarios.py``), a sliver cut
        from a population on the move a fraction of it.
    seed, n_init : int
        Seed and number of k-means++ restarts of the two-component fit.
    reg_covar : float
        Added to the diagonal of the fits' covariances.

    Returns
    -------
    parts : tuple (fractions, means, covariances, gain) or None
        ``fractions`` (2,), ``means`` (2, D), ``covariances`` (2, D, D) in data units,
        and ``gain``, the BIC of one Gaussian minus that of two, when two win.
    """
    from .warmup import bic, initialise   # warmup imports this module's siblings

    X = np.asarray(X, dtype=np.float64)
    if hard_split_gain(X) <= 0.0:   # deterministic: no generator to seed
        return None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            one = initialise(X, 1, covariance, seed=seed, n_init=1, reg_covar=reg_covar)
            two = initialise(X, 2, covariance, seed=seed, n_init=n_init, reg_covar=reg_covar)
    except (NotEnoughDataError, ModelError, np.linalg.LinAlgError):
        return None
    gain = bic(one, X) - bic(two, X)
    if not gain > min_gain * len(X) or two.weights.min() < min_share:
        return None
    # rows are in stream order: two groups that live side by side are both in the
    # newer half; a group that moved leaves its old place empty there (a move, which
    # the segment follows, not a split)
    newer = np.bincount(two.score(X[len(X) // 2:]).component, minlength=2) / (len(X) - len(X) // 2)
    if np.any(newer < 0.5 * two.weights):
        return None
    return two.weights.copy(), two.data_means(), two.data_covariance_matrices(), float(gain)


def recent_share(rows, n: int, trim: float = 0.1) -> float:
    """The share of the stream's rows that a group born at row ``n`` takes, from the
    stream positions ``rows`` of its members in the pool.

    A new group's rows arrive at a steady rate since it appeared, while a few older
    scattered rows may sit in the pool with them. The oldest ``trim`` share of the
    members is set aside: with ``c`` members sorted by row, ``r_j`` the first kept
    (``j = ceil(trim c)``), the share is ``(c - j + 1) / (n - r_j)``. For rows at a
    steady rate since row ``s`` this is ``c / (n - s)`` up to sampling, whatever
    ``trim``; the group's first rows alone would let one old stray row stretch the
    span (and shrink the share) as far back as the pool reaches.

    Parameters
    ----------
    rows : array_like of int
        Stream positions of the group's members (at least one).
    n : int
        The stream position now.
    trim : float, default 0.1

    Returns
    -------
    float
    """
    rows = np.sort(np.asarray(rows, dtype=np.int64))
    c = rows.size
    j = max(int(np.ceil(trim * c)), 1)
    return (c - j + 1) / max(n - int(rows[j - 1]), c - j + 1)
