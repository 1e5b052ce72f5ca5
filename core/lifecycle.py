"""Segment lifecycle on a mixture: merge, retire, add, and the tests that call for them.

Every function here is pure: it takes a :class:`~shoal.core.mixture.Mixture` and returns
a new one (or an array), and leaves the old one untouched. Segment ids keep their
meaning: a merged pair keeps the older (smaller) id, a retired id is never used again,
and a new component takes ``next_id``, which only ever grows.

The sufficient statistics are additive, so a merge adds the two components' ``s0``,
``s1`` and ``s2`` and derives parameters from the sum: the merged Gaussian has exactly
the mean and covariance of the union of the rows the two components had absorbed.
A retirement or an addition keeps the total mass of the statistics unchanged (the
other components are scaled up or down together, which leaves their means and
covariances as they were and renormalises the weights).

When the mixture uses Polyak-Ruppert averaging, the averaged statistics are changed
in the same way, and the parameters are derived from them as at a refresh point.
"""

from __future__ import annotations

import functools
import warnings
from dataclasses import replace

import numpy as np
from scipy import special

from .distances import (
    bhattacharyya_distance,
    bhattacharyya_lower_bound,
    hellinger_distance,
    hellinger_from_bhattacharyya,
    pair_indices,
    pairwise_bhattacharyya,
)
from .errors import ModelError, NotEnoughDataError
from .split_screen import hard_split_gain
from .mixture import Mixture

__all__ = [
    "OVERLAP_MEASURES",
    "add_component",
    "compact_group",
    "widening_explains",
    "split",
    "split_test",
    "merge",
    "overlap",
    "overlapping_pairs",
    "retire",
    "segment_index",
    "chi2_quantile",
    "squared_mahalanobis",
    "unexplained",
    "unexplained_below",
]

OVERLAP_MEASURES = {
    "hellinger": hellinger_distance,
    "bhattacharyya": bhattacharyya_distance,
}
"""Distances between two Gaussians, zero for identical ones; smaller means more overlap."""

_LOG_2PI = float(np.log(2.0 * np.pi))
_STATS = ("s0", "s1", "s2")
_AVG_STATS = ("avg_s0", "avg_s1", "avg_s2")


# --------------------------------------------------------------------------- helpers
@functools.lru_cache(maxsize=64)
def _chi2_quantile(probability: float, dof: int) -> float:
    return float(2.0 * special.gammaincinv(0.5 * dof, probability))


def chi2_quantile(probability, dof) -> float:
    """The chi-square(``dof``) quantile at ``probability`` (as ``scipy.stats.chi2.ppf``,
    which computes ``2 gammaincinv(dof / 2, p)``; cached, and without importing
    scipy.stats, which costs seconds at start-up)."""
    return _chi2_quantile(float(probability), int(dof))


def segment_index(ids, segment_id, where="the mixture") -> int:
    """Position of a stable segment id in ``ids``; a clear error if it is not there once."""
    hits = np.flatnonzero(np.asarray(ids) == segment_id)
    if hits.size != 1:
        raise ModelError(
            f"segment {segment_id!r} is not in {where}; its segments are {np.asarray(ids).tolist()}"
        )
    return int(hits[0])


def _rebuilt(mixture: Mixture, ids, next_id, stat_arrays: dict) -> Mixture:
    """A copy with new statistics and ids, parameters derived once from the statistics."""
    averaged = mixture.averaging and mixture.avg_count > 0
    source = _AVG_STATS if averaged else _STATS
    params = mixture.derive(*(stat_arrays[name] for name in source), mixture.sumsq)
    return replace(
        mixture, ids=np.asarray(ids, dtype=np.int64), next_id=int(next_id),
        **stat_arrays, **params,
    )


def _all_stats(mixture: Mixture) -> dict:
    return {name: np.array(getattr(mixture, name)) for name in _STATS + _AVG_STATS}


# --------------------------------------------------------------------------- lifecycle


def merge(mixture: Mixture, id_a, id_b) -> Mixture:
    """Merge two segments by adding their sufficient statistics.

    Parameters
    ----------
    mixture : Mixture
    id_a, id_b : int
        Stable ids of two different segments of ``mixture``.

    Returns
    -------
    merged : Mixture
        One component fewer. The survivor keeps the older (smaller) id and its
        position; the other id is gone for good (``next_id`` is unchanged). Its
        weight is the sum of the two weights, its mean and covariance those of the
        union of the rows behind the two components.
    """
    if id_a == id_b:
        raise ModelError(f"cannot merge segment {id_a!r} with itself")
    keep_id, drop_id = sorted((int(id_a), int(id_b)))
    keep, drop = segment_index(mixture.ids, keep_id), segment_index(mixture.ids, drop_id)
    arrays = {}
    for name, array in _all_stats(mixture).items():
        array[keep] = array[keep] + array[drop]
        arrays[name] = np.delete(array, drop, axis=0)
    return _rebuilt(mixture, np.delete(mixture.ids, drop), mixture.next_id, arrays)


def retire(mixture: Mixture, segment_id) -> Mixture:
    """Drop a segment; its share of mass is spread over the others in proportion.

    Parameters
    ----------
    mixture : Mixture
        Must hold at least two segments.
    segment_id : int

    Returns
    -------
    retired : Mixture
        One component fewer; the others keep their means, covariances and ids, and
        their weights are renormalised. The retired id is never reused.
    """
    if mixture.n_components < 2:
        raise ModelError("cannot retire the only segment of a mixture")
    drop = segment_index(mixture.ids, segment_id)
    arrays = _all_stats(mixture)
    for s0_name, names in (("s0", _STATS), ("avg_s0", _AVG_STATS)):
        s0 = arrays[s0_name]
        total, rest = float(np.sum(s0)), float(np.sum(s0) - s0[drop])
        factor = total / rest if rest > 0 else 1.0
        for name in names:
            arrays[name] = np.delete(arrays[name], drop, axis=0) * factor
    return _rebuilt(mixture, np.delete(mixture.ids, drop), mixture.next_id, arrays)


def _second_moment(mixture: Mixture, mean, covariance):
    """A Gaussian in data units as a standardised mean and second moment of the
    mixture's covariance type."""
    zmean = (np.asarray(mean, dtype=np.float64) - mixture.center) / mixture.scale
    zcov = np.asarray(covariance, dtype=np.float64) / np.outer(mixture.scale, mixture.scale)
    if mixture.covariance == "full":
        return zmean, zcov + np.outer(zmean, zmean)
    if mixture.covariance == "diag":
        return zmean, np.diagonal(zcov) + zmean**2
    return zmean, np.trace(zcov) / mixture.n_features + np.mean(zmean**2)


def split(mixture: Mixture, segment_id, fractions, means, covariances) -> Mixture:
    """Split a segment in two; the larger part keeps the id, the other takes ``next_id``.

    Parameters
    ----------
    mixture : Mixture
    segment_id : int
    fractions : array_like of shape (2,)
        Shares of the segment's mass the two parts take (normalised here).
    means : array_like of shape (2, n_features)
        In the data's own units.
    covariances : array_like of shape (2, n_features, n_features)
        Full covariance matrices in data units (reduced to the mixture's type).

    Returns
    -------
    split : Mixture
        One component more: the larger part in the segment's place with its id, the
        other appended last with id ``mixture.next_id``. The segment's mass is
        shared between the two; the other segments are unchanged.
    """
    k = segment_index(mixture.ids, segment_id)
    fractions = np.asarray(fractions, dtype=np.float64)
    if fractions.shape != (2,) or not np.all(fractions > 0):
        raise ModelError(f"fractions should be two positive shares, got {fractions!r}")
    fractions = fractions / fractions.sum()
    order = [0, 1] if fractions[0] >= fractions[1] else [1, 0]
    parts = [_second_moment(mixture, means[j], covariances[j]) for j in order]
    arrays = _all_stats(mixture)
    for s0_name, names in (("s0", _STATS), ("avg_s0", _AVG_STATS)):
        mass = float(arrays[s0_name][k])
        stats = [[mass * fractions[j], mass * fractions[j] * zm, mass * fractions[j] * m2]
                 for j, (zm, m2) in zip(order, parts)]
        for i, name in enumerate(names):
            arrays[name][k] = stats[0][i]
            arrays[name] = np.concatenate([arrays[name], np.asarray(stats[1][i])[None]])
    ids = np.append(mixture.ids, np.int64(mixture.next_id))
    return _rebuilt(mixture, ids, mixture.next_id + 1, arrays)


def add_component(mixture: Mixture, weight, mean, covariance) -> Mixture:
    """Add a new segment, for example one fitted on a pool of unexplained rows.

    Parameters
    ----------
    mixture : Mixture
    weight : float in (0, 1)
        The new segment's share of the mass; the others are scaled by ``1 - weight``.
    mean : array_like of shape (n_features,)
        In the data's own units.
    covariance : array_like of shape (n_features, n_features)
        A full covariance matrix in data units (for a pool fit with another
        covariance type, ``fit.data_covariance_matrices()[j]``). A diag mixture keeps
        its diagonal; a spherical one the mean of its diagonal in standardised units.

    Returns
    -------
    grown : Mixture
        One component more, appended last, with id ``mixture.next_id``; ``next_id``
        grows by one.
    """
    n_features = mixture.n_features
    weight = float(weight)
    if not 0.0 < weight < 1.0:
        raise ModelError(f"weight should lie in (0, 1), got {weight!r}")
    mean = np.asarray(mean, dtype=np.float64)
    covariance = np.asarray(covariance, dtype=np.float64)
    if mean.shape != (n_features,):
        raise ModelError(f"mean should have shape ({n_features},), got {mean.shape}")
    if covariance.shape != (n_features, n_features):
        raise ModelError(
            f"covariance should have shape ({n_features}, {n_features}), got {covariance.shape}"
        )
    if not (np.all(np.isfinite(mean)) and np.all(np.isfinite(covariance))):
        raise ModelError("mean and covariance should be finite")
    zmean, second = _second_moment(mixture, mean, covariance)
    arrays = _all_stats(mixture)
    for s0_name, names in (("s0", _STATS), ("avg_s0", _AVG_STATS)):
        mass = weight * float(np.sum(arrays[s0_name]))
        new = (np.array([mass]), (mass * zmean)[None], (mass * np.asarray(second))[None])
        for name, row in zip(names, new):
            arrays[name] = np.concatenate([arrays[name] * (1.0 - weight), row])
    ids = np.append(mixture.ids, np.int64(mixture.next_id))
    return _rebuilt(mixture, ids, mixture.next_id + 1, arrays)


# --------------------------------------------------------------------------- tests


def overlap(mixture: Mixture, measure: str = "hellinger",
            below: float | None = None) -> np.ndarray:
    """Pairwise distances between the mixture's Gaussians.

    Parameters
    ----------
    mixture : Mixture
    measure : {"hellinger", "bhattacharyya"}
        Hellinger distance in [0, 1], or Bhattacharyya distance in [0, inf). Both
        are invariant to the affine standardisation, so they are computed in
        standardised units.
    below : float, optional
        Only distances under this are wanted: pairs that a cheap lower bound
        (:func:`~shoal.core.distances.bhattacharyya_lower_bound`) puts at or above it
        are not computed and given as ``inf``; the others are exact.

    Returns
    -------
    distances : ndarray of shape (n_components, n_components)
        Symmetric, zero on the diagonal; rows and columns follow ``mixture.ids``.
    """
    if measure not in OVERLAP_MEASURES:
        raise ModelError(f"measure should be one of {sorted(OVERLAP_MEASURES)}, got {measure!r}")
    covs = mixture.family.matrices(mixture.covariances, mixture.n_features)
    pairs = None
    if below is not None:
        limit = float(below)   # the same bound on the Bhattacharyya distance
        if measure == "hellinger":
            limit = -np.log1p(-below * below) if below < 1.0 else np.inf
        # a relative margin far above rounding, so no pair under the bound is skipped
        pairs = bhattacharyya_lower_bound(mixture.means, covs) < limit * (1.0 + 1e-6)
    distances = pairwise_bhattacharyya(mixture.means, covs, pairs)
    if measure == "hellinger":
        distances = hellinger_from_bhattacharyya(distances)
    return distances


def overlapping_pairs(mixture: Mixture, max_distance: float, measure: str = "hellinger"):
    """Pairs of segments closer than ``max_distance``, most overlapping first.

    Only the pairs that a lower bound from means and traces does not already put at
    ``max_distance`` or more are factorised (on separated segments, none).

    Returns
    -------
    pairs : list of (int, int, float)
        ``(older id, newer id, distance)``, sorted by distance, then by ids.
    """
    distances = overlap(mixture, measure, below=max_distance)
    rows, cols = pair_indices(mixture.n_components)
    pairs = []
    for i, j in zip(rows, cols):
        if distances[i, j] < max_distance:
            a, b = sorted((int(mixture.ids[i]), int(mixture.ids[j])))
            pairs.append((a, b, float(distances[i, j])))
    return sorted(pairs, key=lambda pair: (pair[2], pair[0], pair[1]))


def squared_mahalanobis(mixture: Mixture, X) -> np.ndarray:
    """Squared Mahalanobis distance of every row to every component.

    Parameters
    ----------
    X : array_like of shape (n_samples, n_features)
        Finite rows in the data's own units.

    Returns
    -------
    d2 : ndarray of shape (n_samples, n_components)
        ``(x - mu_k)' Sigma_k^-1 (x - mu_k)``; the same in data and standardised units.
    """
    # log N(z | k) = -0.5 (D log 2 pi + d2) + log det U_k, and data-unit densities
    # differ from standardised ones by -sum(log scale).
    log_gauss = mixture.component_log_density(X) + np.sum(np.log(mixture.scale))
    d2 = -2.0 * (log_gauss - mixture.log_det) - mixture.n_features * _LOG_2PI
    return np.maximum(d2, 0.0)


def unexplained(mixture: Mixture, X, threshold: float = 0.999) -> np.ndarray:
    """Rows that no segment explains: too far from every component.

    A row is unexplained when its squared Mahalanobis distance to every component
    exceeds the ``threshold`` quantile of the chi-square distribution with
    ``n_features`` degrees of freedom (the distribution of that distance for a row
    the component did generate), from :func:`chi2_quantile`.

    Parameters
    ----------
    mixture : Mixture
    X : array_like of shape (n_samples, n_features)
    threshold : float in (0, 1), default 0.999
        With it, a row of a segment is unexplained by that segment with probability
        ``1 - threshold``.

    Returns
    -------
    mask : ndarray of bool, shape (n_samples,)
    """
    threshold = float(threshold)
    if not 0.0 < threshold < 1.0:
        raise ModelError(f"threshold should be a probability in (0, 1), got {threshold!r}")
    bound = chi2_quantile(threshold, mixture.n_features)
    return np.all(squared_mahalanobis(mixture, X) > bound, axis=1)


def unexplained_below(mixture: Mixture, threshold: float = 0.999) -> float:
    """A log-density above which no row can be unexplained (a cheap first filter).

    A row that every component leaves unexplained has ``d2_k > b`` for all ``k``
    (``b`` the chi-square quantile), so its log-density under the mixture is below
    ``logsumexp_k(log w_k - (D log 2 pi + b) / 2 + log det U_k) - sum(log scale)``.
    Only rows under this bound need the exact test of :func:`unexplained`.

    Returns
    -------
    bound : float
        In the data's own units, as ``Scores.log_density``.
    """
    bound = chi2_quantile(threshold, mixture.n_features)
    terms = (np.log(mixture.weights) - 0.5 * (mixture.n_features * _LOG_2PI + bound)
             + mixture.log_det)
    top = float(np.max(terms))
    return top + float(np.log(np.sum(np.exp(terms - top)))) - float(np.sum(np.log(mixture.scale)))


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
    X : array_like of shape (n_samples, n_features)
        The group's rows, data units.
    mean, covariance : array_like of shapes (n_features,), (n_features, n_features)
        The group's Gaussian, data units.

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


def _gaussian_fit_log_likelihood(X) -> float:
    """The log-likelihood of rows under their own maximum-likelihood Gaussian,
    ``-n/2 (D log 2 pi + log |S| + D)``."""
    n, d = X.shape
    sign, log_det = np.linalg.slogdet(np.cov(X, rowvar=False, bias=True).reshape(d, d))
    if sign <= 0:
        return -np.inf
    return -0.5 * n * (d * _LOG_2PI + log_det + d)


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
        nat per row). Two groups apart enough to be segments gain 1.1-3.0 per row on
        the seeded lumped scenarios; a sliver cut from a population on the move
        gains a fraction of that (0.17 measured).

    Returns
    -------
    parts : tuple (fractions, means, covariances, gain) or None
        ``fractions`` (2,), ``means`` (2, D), ``covariances`` (2, D, D) in data units,
        and ``gain``, the BIC of one Gaussian minus that of two, when two win.
    """
    from .warmup import bic, initialise   # warmup imports this module's siblings

    X = np.asarray(X, dtype=np.float64)
    if hard_split_gain(X, np.random.default_rng(seed)) <= 0.0:
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
