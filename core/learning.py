"""Scoring a batch of rows, learning from it with stepwise EM, and one batch EM step.

The kernels behind :meth:`Mixture.score`, :meth:`Mixture.learn` and
:meth:`Mixture.em_step`. Each picks the compiled path (:mod:`shoal.core.fused`) or the
numpy path (:mod:`shoal.core.scoring`, :mod:`shoal.core.gap_spans` for rows with
missing values); both give the same results up to the order of floating-point
operations.
"""

from __future__ import annotations

from dataclasses import replace
from functools import wraps

import numpy as np

from . import fused, missing, packed_gaps
from .errors import ModelError
from .gap_spans import em_step_gaps, learn_span_gaps, score_gaps
from .gaps import NOT_FINITE
from .parameters import derive, evolve, refresh
from .piece_moments import PieceMoments
from .scoring import (
    SPAN_ROWS,
    ScoreBuffer,
    Standardiser,
    accumulate,
    checked_rows,
    score_span,
    score_standardised,
)

__all__ = ["retry_with_gaps", "score_rows", "learn_rows", "em_step_rows",
           "em_step_standardised"]

def retry_with_gaps(always_fill=False):
    """Decorate a method ``f(mixture, X, *, _gaps=None)`` that refuses NaN.

    The method runs on complete rows as it is (no extra pass over them); if a row has a
    missing feature (:class:`shoal.core.missing.MissingValues`), it runs again with
    ``_gaps`` (:class:`shoal.core.missing.Gaps`) saying where. Both paths read the NaN
    and mend the rows' design themselves, block by block; with ``always_fill`` the
    method gets a copy of the rows filled at the centre instead.

    Parameters
    ----------
    always_fill : bool

    Returns
    -------
    decorator : callable
    """
    def decorate(method):
        @wraps(method)
        def wrapper(mixture, X, *args, _gaps=None, **kwargs):
            if _gaps is not None:
                return method(mixture, X, *args, _gaps=_gaps, **kwargs)
            try:
                return method(mixture, X, *args, **kwargs)
            except missing.MissingValues:
                X = checked_rows(mixture, X, check=False)
                gaps = missing.find(X, fused.kernels() if fused.enabled() else None)
                if gaps is None:        # nothing missing: only overflowing sums
                    raise ModelError(NOT_FINITE) from None
                if always_fill:
                    X = missing.fill(X, mixture.center, gaps)
                return method(mixture, X, *args, _gaps=gaps, **kwargs)
        return wrapper
    return decorate


def score_rows(mixture, X, gaps=None):
    """Score rows without learning from them, in blocks of a few thousand.

    Parameters
    ----------
    mixture : Mixture
    X : array-like of shape (n_samples, n_features)
        Rows in the data's own units.
    gaps : Gaps or None
        Where ``X`` holds NaN (missing values); None for complete rows.

    Returns
    -------
    scores : Scores
    """
    X = checked_rows(mixture, X, check=not fused.enabled() and gaps is None)
    out = ScoreBuffer(X.shape[0], mixture.n_components)
    if fused.enabled():
        packed = None if gaps is None else packed_gaps.pack(gaps, mixture.covariance,
                                                      mixture.n_components)
        fused.compiled_span(mixture, X, 0, X.shape[0], out, gaps=packed)
    elif gaps is not None:
        score_gaps(mixture, X, gaps, out)
    else:
        operator = mixture.scoring_operator
        rows = Standardiser(mixture.center, mixture.scale)
        for lo in range(0, X.shape[0], SPAN_ROWS):
            score_span(mixture, X, lo, min(lo + SPAN_ROWS, X.shape[0]), out, operator, rows)
    return out.scores(mixture.ids)


def learn_rows(mixture, X, gaps=None, moments=False, scratch=None):
    """Score rows, then learn from them with stepwise EM (see :meth:`Mixture.learn`).

    Parameters
    ----------
    mixture, X, gaps
        As for :func:`score_rows`.
    moments : bool, default False
        Also give the rows' per-segment moments (``scores.moments``,
        :class:`shoal.core.piece_moments.PieceMoments`) from the M-step's statistics,
        for complete rows and the full and diag types (None otherwise).
    scratch : ScoreScratch or None
        Buffers to score into (the scores are views into them, valid until the next
        call with the same scratch); None: fresh ones.

    Returns
    -------
    mixture : Mixture
        The updated mixture.
    scores : Scores
        Every row's scores under the parameters in force at its place in the stream.
    """
    jit = fused.enabled()
    X = checked_rows(mixture, X, check=not jit and gaps is None)
    n = X.shape[0]
    out = (ScoreBuffer(n, mixture.n_components) if scratch is None
           else scratch.buffer(n, mixture.n_components))
    rows = None if jit else Standardiser(mixture.center, mixture.scale)
    model = mixture  # the parameters in force; replaced at refresh points only
    s0, s1, s2, sumsq = mixture.s0, mixture.s1, mixture.s2, mixture.sumsq
    at = mixture.n_rows
    pos = 0
    every = mixture.refresh_rows
    # rows with gaps: in the compiled kernels on that path, else by core/gap_spans.py
    packed = None if gaps is None or not jit else packed_gaps.pack(
        gaps, mixture.covariance, mixture.n_components)
    gap_rows = None if jit else gaps
    piece = None
    with_moments = moments and gaps is None and mixture.covariance in ("full", "diag")
    while pos < n:
        # pieces end at refresh points, which sit at fixed places in the stream;
        # they are scored in cache-sized blocks, then learned from in one go
        take = min(n - pos, every - at % every)
        row_w, keep = mixture.schedule.row_weights(at, take)
        # the moments' responsibility totals are summed as the responsibilities are made
        sums = (np.zeros(mixture.n_components), np.zeros(mixture.n_components)) \
            if with_moments and jit else None
        if jit:
            b0, b1, b2 = fused.compiled_span(model, X, pos, pos + take, out, True, row_w,
                                             mixture.resp_floor, packed, sums)
        elif gap_rows is not None:
            b0, b1, b2 = learn_span_gaps(model, X, pos, pos + take, gap_rows, row_w, out,
                                         rows)
        else:
            A = score_span(model, X, pos, pos + take, out, model.scoring_operator, rows)
            b0, b1, b2 = accumulate(model, A, out.resp_kn[:, pos : pos + take], row_w)
        if with_moments:
            unit = mixture.schedule.cell_unit(at - at % every, at + take)
            if piece is None:
                piece = PieceMoments.of_span(out.resp_kn[:, pos:pos + take], b0, b1, b2, unit,
                                             mixture.scale, sums)
            else:
                piece.add_span(out.resp_kn[:, pos:pos + take], b0, b1, b2, unit, sums)
        s0 = keep * s0 + b0
        s1 = keep * s1 + b1
        s2 = keep * s2 + b2
        sumsq = keep * keep * sumsq + float(np.dot(row_w, row_w))
        pos += take
        at += take
        if at % every == 0:
            model = evolve(model, **refresh(model, s0, s1, s2, sumsq))
    if with_moments and piece is None:   # no rows
        piece = PieceMoments.empty(mixture.n_components, mixture.n_features, mixture.scale)
    model = evolve(model, s0=s0, s1=s1, s2=s2, sumsq=sumsq, n_rows=at)
    return model, out.scores(mixture.ids, piece)


def em_step_rows(mixture, X, gaps=None):
    """One full-batch EM iteration (step size 1) on data-unit rows ``X``.

    Parameters
    ----------
    mixture : Mixture
    X : array-like of shape (n_samples, n_features)
        Filled at the centre where ``gaps`` says a value is missing.
    gaps : Gaps or None

    Returns
    -------
    mixture : Mixture
    mean_log_density : float
        See :func:`em_step_standardised`.
    """
    Z = mixture.standardise(X)
    if gaps is not None:
        return em_step_gaps(mixture, Z, gaps)
    return em_step_standardised(mixture, Z)


def em_step_standardised(mixture, Z):
    """One full-batch EM iteration (step size 1) on finite standardised rows.

    Parameters
    ----------
    mixture : Mixture
    Z : ndarray of shape (n_samples, n_features)

    Returns
    -------
    mixture : Mixture
        Statistics the batch averages, parameters derived from them.
    mean_log_density : float
        Per row, data units, under the parameters *before* the step.
    """
    n = Z.shape[0]
    # Batch EM stays exact: the sparse floor is for the stepwise path only.
    out, (s0, s1, s2) = score_standardised(mixture, Z, moments_weight=1.0 / n)
    scores = out.scores(mixture.ids)
    sumsq = 1.0 / n
    params = derive(mixture, s0, s1, s2, sumsq)
    new = replace(mixture, s0=s0, s1=s1, s2=s2, sumsq=sumsq, **params)
    return new, float(np.mean(scores.log_density))
