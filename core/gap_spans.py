"""Spans of rows with missing values on the numpy path, and the batch EM step with them.

Every row of a span goes through the ordinary log-joint and moments kernels with its
missing values at the centre (zero in standardised units); the algebra of
:mod:`shoal.core.missing` then corrects the filled rows' log-joint to their marginals
before the responsibilities are taken, and adds what completing them contributes to
the statistics. So a span with a few incomplete rows costs one ordinary pass plus a
correction the size of those rows. The compiled path does the same inside its kernels
(:func:`shoal.core.fused.compiled_span` with ``gaps``).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from . import missing
from .missing import Gaps
from .parameters import derive, evolve
from .scoring import (
    BLOCK_ROWS,
    SPAN_ROWS,
    ScoreBuffer,
    Standardiser,
    accumulate,
    normalise,
    score_span,
    score_standardised,
)

__all__ = ["batch_layout", "score_span_gaps", "score_gaps", "learn_span_gaps", "em_step_gaps"]


def batch_layout(mixture, X, gaps, rows, lo, hi, step):
    """The layout of the rows of ``X`` with gaps, made on first use and kept on ``gaps``,
    and its span ``lo:hi``.

    Which rows miss which features, and those rows standardised with their missing
    values at the centre, do not depend on the parameters: they are worked out once
    per batch, for spans ``lo:hi``, then every ``step`` rows, not once per span.

    Parameters
    ----------
    mixture : Mixture
    X : ndarray of shape (n_samples, n_features)
        Data-unit rows with ``rows``, else standardised rows with the missing values
        at zero.
    gaps : Gaps
        Where ``X`` has missing values.
    rows : Standardiser or None
    lo, hi, step : int

    Returns
    -------
    layout : GapLayout
    part : tuple
        ``layout.span(lo, hi)``.
    """
    kept = gaps.prepared
    if kept is not None and kept[0] is X and kept[1] is rows \
            and kept[2] == mixture.covariance:
        part = kept[3].span(lo, hi)
        if part is not None:
            return kept[3], part
        Z = kept[3].Zf                  # spans elsewhere: the same rows, laid out anew
    else:
        Z = gaps.values if gaps.values is not None else np.take(X, gaps.rows, axis=0)
        gaps.values = None              # standardised in place below
        if rows is not None:
            for a in range(0, Z.shape[0], BLOCK_ROWS):
                Z[a : a + BLOCK_ROWS] = rows(Z[a : a + BLOCK_ROWS])
    n = X.shape[0]
    bounds = np.unique(np.concatenate(([0, lo], np.arange(hi, n, step), [n])))
    layout = missing.GapLayout(gaps.rows, Z, gaps.mask, np.log(mixture.scale),
                               mixture.covariance, bounds)
    gaps.prepared = (X, rows, mixture.covariance, layout)
    return layout, layout.span(lo, hi)


def score_span_gaps(mixture, X, lo, hi, layout, part, out, rows, learn):
    """Score rows ``lo:hi`` of ``X``, some of which have missing values.

    Parameters
    ----------
    mixture : Mixture
    X : ndarray of shape (n_samples, n_features)
        Data-unit rows with ``rows`` (NaN where missing), else standardised rows with
        the missing values at zero.
    lo, hi : int
    layout : GapLayout
        Of the rows of ``X`` with gaps (:func:`batch_layout`).
    part : tuple
        ``layout.span(lo, hi)``.
    out : ScoreBuffer
    rows : Standardiser or None
    learn : bool
        Also return what the E-step needs.

    Returns
    -------
    A : ndarray of shape (hi - lo, width)
        The span's design matrix, missing values at the centre.
    aux : tuple or None
        With ``learn``, for :func:`shoal.core.missing.completion_moments`.
    """
    family = mixture.family
    operator = mixture.scoring_operator
    A = np.empty((hi - lo, family.width(mixture.n_features)))
    # the corrections first (they need the parameters, not the log-joint), then block
    # by block: the ordinary log-joint, the corrections on it, the scores
    corr = layout.zeros("corrections", (hi - lo, mixture.n_components))
    aux = missing.span_correction(mixture, layout, part, corr, learn)
    ga, gb = part[:2]
    cut = (np.searchsorted(layout.rows[ga:gb], np.arange(lo, hi, BLOCK_ROWS)) + ga).tolist()
    cut.append(gb)
    for i, a in enumerate(range(lo, hi, BLOCK_ROWS)):
        b = min(a + BLOCK_ROWS, hi)
        Zb = X[a:b] if rows is None else rows(X[a:b])
        if rows is not None and cut[i] < cut[i + 1]:
            Zb[layout.rows[cut[i] : cut[i + 1]] - a] = layout.Zf[cut[i] : cut[i + 1]]
        Ab = family.design(Zb, out=A[a - lo : b - lo])
        resp = out.resp_kn[:, a:b]
        family.log_joint(Ab, operator, out=resp)
        resp += corr[a - lo : b - lo].T
        normalise(resp, out, a, b, mixture.log_scale_sum)
    return A, aux


def score_gaps(mixture, X, gaps, out) -> None:
    """Score data-unit rows, some with missing values, into ``out``.

    Parameters
    ----------
    mixture : Mixture
    X : ndarray of shape (n_samples, n_features)
        NaN where a value is missing.
    gaps : Gaps
        Where.
    out : ScoreBuffer
    """
    rows = Standardiser(mixture.center, mixture.scale)
    for lo in range(0, X.shape[0], SPAN_ROWS):
        hi = min(lo + SPAN_ROWS, X.shape[0])
        layout, part = batch_layout(mixture, X, gaps, rows, lo, hi, SPAN_ROWS)
        score_span_gaps(mixture, X, lo, hi, layout, part, out, rows, learn=False)


def learn_span_gaps(mixture, X, lo, hi, gaps, row_w, out, rows):
    """The statistics of rows ``lo:hi`` of ``X`` with weights ``row_w``; scores into ``out``.

    Parameters
    ----------
    mixture : Mixture
        The parameters in force for the span.
    X : ndarray of shape (n_samples, n_features)
        Data-unit rows, NaN where missing.
    lo, hi : int
    gaps : Gaps
        The missing values of all of ``X``.
    row_w : ndarray of shape (hi - lo,)
    out : ScoreBuffer
    rows : Standardiser

    Returns
    -------
    s0 : ndarray of shape (n_components,)
    s1 : ndarray of shape (n_components, n_features)
    s2 : ndarray, the covariance type's second-moment shape
        Every row's moments through the ordinary kernels, plus what completing the
        rows with gaps adds (EM with missing data).
    """
    layout, part = batch_layout(mixture, X, gaps, rows, lo, hi, mixture.refresh_rows)
    ga, gb = part[:2]
    if ga == gb:
        A = score_span(mixture, X, lo, hi, out, mixture.scoring_operator, rows)
        return accumulate(mixture, A, out.resp_kn[:, lo:hi], row_w)
    A, aux = score_span_gaps(mixture, X, lo, hi, layout, part, out, rows, learn=True)
    s0, s1, s2 = accumulate(mixture, A, out.resp_kn[:, lo:hi], row_w)
    W = np.take(out.resp_kn, layout.rows[ga:gb], axis=1)
    if mixture.resp_floor > 0.0:
        W[W < mixture.resp_floor] = 0.0
    W *= row_w[layout.rows[ga:gb] - lo]
    W = np.ascontiguousarray(W.T)
    c1, c2 = missing.span_completion(mixture, W, aux)
    return s0, s1 + c1, s2 + c2


def _gap_block(mixture, Z, gaps, out):
    """Score the standardised rows ``gaps.rows`` of ``Z`` (filled at zero) by their
    marginals into ``out``; return their responsibilities and E-step pieces."""
    rows = gaps.rows
    L, aux = missing.gap_log_joint(mixture, Z[rows], gaps.mask, learn=True)
    sub = ScoreBuffer(rows.size, mixture.n_components)
    sub.resp_kn[:] = L
    normalise(sub.resp_kn, sub, 0, rows.size, mixture.log_scale_sum)
    out.put(rows, sub)
    return sub.resp_kn, aux


def em_step_gaps(mixture, Z, gaps):
    """One batch EM step on standardised rows with gaps (filled at zero).

    Parameters
    ----------
    mixture : Mixture
    Z : ndarray of shape (n_samples, n_features)
    gaps : Gaps

    Returns
    -------
    mixture : Mixture
        Statistics the batch averages (complete rows through the ordinary batch E-step,
        the others by EM with missing data), parameters derived from them.
    mean_log_density : float
        Per row of ``Z`` in data units, under the parameters before the step.
    """
    n = Z.shape[0]
    complete = np.ones(n, dtype=bool)
    complete[gaps.rows] = False
    log_density = np.empty(n)
    if complete.any():
        out, stats = score_standardised(mixture, np.ascontiguousarray(Z[complete]),
                                        moments_weight=1.0 / n)
        log_density[complete] = out.log_density
    else:
        stats = (np.zeros_like(mixture.s0), np.zeros_like(mixture.s1),
                 np.zeros_like(mixture.s2))
    out = ScoreBuffer(n, mixture.n_components)
    # in standardised units: the gap kernels add back log-scale terms of the missing
    # features that standardised rows do not carry
    unit = evolve(mixture, center=np.zeros_like(mixture.center),
                  scale=np.ones_like(mixture.scale))
    for a in range(0, len(gaps), missing.BLOCK_ROWS):
        part = Gaps(gaps.rows[a : a + missing.BLOCK_ROWS],
                    gaps.mask[a : a + missing.BLOCK_ROWS])
        resp, aux = _gap_block(unit, Z, part, out)
        stats = tuple(x + y for x, y in
                      zip(stats, missing.gap_moments(mixture, resp / n, aux)))
    log_density[gaps.rows] = (out.log_density[gaps.rows] - mixture.log_scale_sum
                              + gaps.mask @ np.log(mixture.scale))
    s0, s1, s2 = stats
    params = derive(mixture, s0, s1, s2, 1.0 / n)
    new = replace(mixture, s0=s0, s1=s1, s2=s2, sumsq=1.0 / n, **params)
    return new, float(np.mean(log_density))
