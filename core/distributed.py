"""Stepwise EM in rounds, for a coordinator and workers that share no memory.

A round covers the stream's rows ``start+1 .. stop`` (global row positions, counted
after warm-up). Every row of the round is scored with the same parameter snapshot;
the round moves the statistics as the product of its rows' steps would:

    S_stop = keep * S_start + sum_i w_i s(x_i),
    w_i = eta_i prod_{i<j<=stop} (1 - eta_j),    keep = prod_{start<j<=stop} (1 - eta_j)

(:meth:`StepSchedule.row_weights` over the whole round). The sum splits over any
partition of the round's rows: a worker holding rows ``lo+1 .. hi`` computes its part
with :func:`round_weights` and :func:`partition_statistics`, and returns a few
``K x D^2`` numbers. The coordinator adds the parts in a fixed order and calls
:func:`apply_round`, which refreshes the parameters when the round ends on a refresh
point. Rounds that end at global multiples of ``R`` therefore give the model that
:meth:`Mixture.learn` gives with ``refresh_rows = R`` (up to rounding in the order of
the sums), whatever the partition.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from . import fused, parameters
from .errors import ModelError
from .mixture import Mixture
from .scoring import BLOCK_ROWS, ScoreBuffer, Scores, accumulate, checked_rows, score_block
from .schedule import StepSchedule

__all__ = ["PartitionStatistics", "keep_between", "round_weights", "partition_statistics",
           "apply_round"]


@dataclass(frozen=True)
class PartitionStatistics:
    """The weighted statistics of one partition of a round (additive over partitions).

    Attributes
    ----------
    s0 : ndarray of shape (n_components,)
    s1 : ndarray of shape (n_components, n_features)
    s2 : ndarray of shape (n_components, n_features, n_features), (n_components, n_features)
        or (n_components,), as the mixture's covariance type keeps it
    sumsq : float
        Sum of the squared row weights.
    n_rows : int
    """

    s0: np.ndarray
    s1: np.ndarray
    s2: np.ndarray
    sumsq: float
    n_rows: int


def keep_between(schedule: StepSchedule, start: int, stop: int) -> float:
    """What rows ``start+1 .. stop`` leave of older statistics.

    Parameters
    ----------
    schedule : StepSchedule
    start, stop : int

    Returns
    -------
    keep : float
        ``prod (1 - eta_j)`` over those rows.
    """
    if stop <= start:
        return 1.0
    return float(np.exp(np.sum(np.log1p(-schedule.steps(start, stop - start)))))


def round_weights(schedule: StepSchedule, lo: int, hi: int, stop: int) -> np.ndarray:
    """Weights of rows ``lo+1 .. hi`` in the statistics of a round that ends at row ``stop``.

    Parameters
    ----------
    schedule : StepSchedule
    lo, hi, stop : int
        ``lo <= hi <= stop``.

    Returns
    -------
    weights : ndarray of shape (hi - lo,)
    """
    if not (lo <= hi <= stop):
        raise ModelError(f"need lo <= hi <= stop, got lo={lo}, hi={hi}, stop={stop}")
    weights, _ = schedule.row_weights(lo, hi - lo)
    return weights * keep_between(schedule, hi, stop)


def partition_statistics(mixture: Mixture, X, weights) -> tuple[PartitionStatistics, Scores]:
    """Score rows with the snapshot ``mixture`` and add them up with ``weights``.

    Parameters
    ----------
    mixture : Mixture
        The round's parameter snapshot.
    X : array-like of shape (n_samples, n_features)
        Finite rows in the data's own units.
    weights : ndarray of shape (n_samples,)
        The rows' weights in the round (:func:`round_weights`).

    Returns
    -------
    statistics : PartitionStatistics
    scores : Scores
        The rows' scores under the snapshot.
    """
    X = checked_rows(mixture, X, check=not fused.enabled())
    weights = np.asarray(weights, dtype=np.float64)
    if weights.shape != (X.shape[0],):
        raise ModelError(f"weights should have shape ({X.shape[0]},), got {weights.shape}")
    n = X.shape[0]
    out = ScoreBuffer(n, mixture.n_components)
    if n and fused.enabled():
        total = fused.compiled_span(mixture, X, 0, n, out, True, weights, mixture.resp_floor)
    else:
        total = (np.zeros_like(mixture.s0), np.zeros_like(mixture.s1), np.zeros_like(mixture.s2))
        for lo in range(0, n, BLOCK_ROWS):
            Zb = (X[lo:lo + BLOCK_ROWS] - mixture.center) / mixture.scale
            A = score_block(mixture, Zb, out, lo)
            hi = lo + Zb.shape[0]
            part = accumulate(mixture, A, out.resp_kn[:, lo:hi], weights[lo:hi])
            total = tuple(a + b for a, b in zip(total, part))
    stats = PartitionStatistics(s0=total[0], s1=total[1], s2=total[2],
                                sumsq=float(np.dot(weights, weights)), n_rows=int(n))
    return stats, out.scores(mixture.ids)


def apply_round(mixture: Mixture, parts, start: int, stop: int, *, refresh: bool) -> Mixture:
    """The mixture after a round of rows ``start+1 .. stop`` whose partitions gave ``parts``.

    ``parts`` are added in the order given (keep it fixed for reproducible results).
    ``mixture.n_rows`` must equal ``start``. With ``refresh``, the parameters are derived
    from the new statistics (as :meth:`Mixture.learn` does at a refresh point); without
    it they stay those in force.

    Parameters
    ----------
    mixture : Mixture
        The model before the round.
    parts : iterable of PartitionStatistics
    start, stop : int
    refresh : bool

    Returns
    -------
    mixture : Mixture
    """
    if mixture.n_rows != start:
        raise ModelError(f"the mixture has learned {mixture.n_rows} rows but the round "
                         f"starts at row {start}")
    parts = list(parts)
    rows = sum(p.n_rows for p in parts)
    if rows != stop - start:
        raise ModelError(f"the round covers {stop - start} rows but its parts hold {rows}")
    keep = keep_between(mixture.schedule, start, stop)
    s0, s1, s2 = keep * mixture.s0, keep * mixture.s1, keep * mixture.s2
    sumsq = keep * keep * mixture.sumsq
    for p in parts:
        s0, s1, s2 = s0 + p.s0, s1 + p.s1, s2 + p.s2
        sumsq += p.sumsq
    model = mixture
    if refresh:
        model = replace(model, **parameters.refresh(model, s0, s1, s2, sumsq))
    return replace(model, s0=s0, s1=s1, s2=s2, sumsq=sumsq, n_rows=stop)
