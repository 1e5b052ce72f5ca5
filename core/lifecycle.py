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

The tests that call for these changes live beside: :mod:`shoal.core.unexplained` (rows
no segment explains), :mod:`shoal.core.segment_groups` (a compact new group, a widened
segment, a split); this module names them for its callers, and measures the overlap
of segment pairs for merges.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np

from . import fused
from .distances import (
    bhattacharyya_distance,
    bhattacharyya_lower_bound,
    hellinger_distance,
    hellinger_from_bhattacharyya,
    pair_indices,
    pairwise_bhattacharyya,
)
from .errors import ModelError
from .mixture import Mixture
from .segment_groups import compact_group, recent_share, split_test, widening_explains
from .unexplained import (chi2_quantile, squared_mahalanobis, unexplained, unexplained_below,
                          unexplained_scored)

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
    "pairs_apart",
    "recent_share",
    "retire",
    "segment_index",
    "chi2_quantile",
    "squared_mahalanobis",
    "unexplained",
    "unexplained_below",
    "unexplained_scored",
]

OVERLAP_MEASURES = {
    "hellinger": hellinger_distance,
    "bhattacharyya": bhattacharyya_distance,
}
"""Distances between two Gaussians, zero for identical ones; smaller means more overlap."""

_STATS = ("s0", "s1", "s2")
_AVG_STATS = ("avg_s0", "avg_s1", "avg_s2")


# --------------------------------------------------------------------------- helpers
def segment_index(ids, segment_id, where="the mixture") -> int:
    """Position of a stable segment id in ``ids``.

    Parameters
    ----------
    ids : array_like of int
    segment_id : int
    where : str
        Named in the error.

    Returns
    -------
    int
        :class:`ModelError` if the id is not there exactly once.
    """
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


def _bhattacharyya_limit(measure: str, below: float) -> float:
    """The Bhattacharyya distance under which a pair may be closer than ``below`` in
    ``measure``, with a relative margin far above rounding (so no such pair is missed)."""
    limit = float(below)
    if measure == "hellinger":
        limit = -math.log1p(-below * below) if below < 1.0 else math.inf
    return limit * (1.0 + 1e-6)


def pairs_apart(mixture: Mixture, distance: float, measure: str = "hellinger",
                margin: float = 1.0) -> bool:
    """Whether no pair of segments can be closer than ``distance``, from means and traces.

    The lower bound of :func:`~shoal.core.distances.bhattacharyya_lower_bound`,
    ``|d|^2 / (4 (tr S_i + tr S_j))``, checked for every pair at once in a few
    whole-matrix steps (the lifecycle asks at every decision point, where segments
    are usually far apart). True means every pair's Bhattacharyya distance is at least
    ``margin`` times the one that ``distance`` corresponds to in ``measure``; False
    means some pair may be closer (its exact distance decides).

    Parameters
    ----------
    mixture : Mixture
    distance : float
    measure : {"hellinger", "bhattacharyya"}, default "hellinger"
    margin : float, default 1.0

    Returns
    -------
    bool
    """
    if measure not in OVERLAP_MEASURES:
        raise ModelError(f"measure should be one of {sorted(OVERLAP_MEASURES)}, got {measure!r}")
    cov, n = mixture.covariances, mixture.n_components
    if n < 2:
        return True
    factor = 4.0 * margin * _bhattacharyya_limit(measure, distance)
    if fused.enabled():   # one compiled loop over the pairs (asked at every 4th point)
        return fused.kernels().pairs_apart(
            np.ascontiguousarray(mixture.means, dtype=np.float64),
            np.ascontiguousarray(cov, dtype=np.float64), 3 - cov.ndim, float(factor))
    traces = (cov.trace(axis1=1, axis2=2) if cov.ndim == 3 else
              cov.sum(axis=1) if cov.ndim == 2 else cov * mixture.n_features)
    apart = mixture.means[:, None, :] - mixture.means[None, :, :]
    gap = np.einsum("ijd,ijd->ij", apart, apart)
    gap.flat[::n + 1] = np.inf   # a component and itself
    return not (gap < factor * (traces[:, None] + traces[None, :])).any()


def _candidates(mixture: Mixture, measure: str, below: float | None):
    """The components' covariance matrices (standardised units) and which pairs of
    :func:`~shoal.core.distances.pair_indices` may lie under ``below`` (all: None)."""
    if measure not in OVERLAP_MEASURES:
        raise ModelError(f"measure should be one of {sorted(OVERLAP_MEASURES)}, got {measure!r}")
    covs = mixture.family.matrices(mixture.covariances, mixture.n_features)
    if below is None:
        return covs, None
    return covs, bhattacharyya_lower_bound(mixture.means, covs) < _bhattacharyya_limit(
        measure, below)


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
    covs, pairs = _candidates(mixture, measure, below)
    distances = pairwise_bhattacharyya(mixture.means, covs, pairs)
    if measure == "hellinger":
        distances = hellinger_from_bhattacharyya(distances)
    return distances


def overlapping_pairs(mixture: Mixture, max_distance: float, measure: str = "hellinger"):
    """Pairs of segments closer than ``max_distance``, most overlapping first.

    Only the pairs that a lower bound from means and traces does not already put at
    ``max_distance`` or more are factorised (on separated segments, none: then nothing
    else is computed).

    Parameters
    ----------
    mixture : Mixture
    max_distance : float
    measure : {"hellinger", "bhattacharyya"}, default "hellinger"

    Returns
    -------
    pairs : list of (int, int, float)
        ``(older id, newer id, distance)``, sorted by distance, then by ids.
    """
    if pairs_apart(mixture, max_distance, measure):
        return []
    covs, close = _candidates(mixture, measure, max_distance)
    if not close.any():
        return []
    distances = pairwise_bhattacharyya(mixture.means, covs, close)
    if measure == "hellinger":
        distances = hellinger_from_bhattacharyya(distances)
    rows, cols = pair_indices(mixture.n_components)
    pairs = []
    for i, j in zip(rows[close], cols[close]):
        if distances[i, j] < max_distance:
            a, b = sorted((int(mixture.ids[i]), int(mixture.ids[j])))
            pairs.append((a, b, float(distances[i, j])))
    return sorted(pairs, key=lambda pair: (pair[2], pair[0], pair[1]))
