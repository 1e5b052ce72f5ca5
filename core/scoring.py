"""Scoring rows on the numpy path, block by block, and the buffers scores go into.

A mixture scores rows in standardised units through its covariance family's kernels
(:mod:`shoal.core.covariance`): build the design matrix of a block, one GEMM for the
log-joint ``log w_k + log N(z | mu_k, Sigma_k)`` of every component, then the
responsibilities and the other scores in place. Blocks are a few thousand rows, so the
``(K*D, rows)`` intermediate stays in the cache and memory beyond the outputs does not
grow with the number of rows. The compiled path does the same in
:func:`shoal.core.fused.compiled_span`.

The functions take the mixture as their first argument and read its public fields
only (``family``, ``scoring_operator``, ``center``, ``scale``, ``ids`` ...).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import fused
from .errors import ModelError
from .gaps import not_finite

__all__ = ["Scores", "ScoreBuffer", "ScoreScratch", "Standardiser", "BLOCK_ROWS", "SPAN_ROWS", "checked_rows",
           "normalise", "score_design", "score_block", "score_span", "score_standardised",
           "accumulate"]

BLOCK_ROWS = 2048  # rows scored at once: the (K*D, rows) intermediate stays in cache
SPAN_ROWS = 8192   # rows whose design matrix is kept for the moments (score-only paths)


@dataclass(frozen=True)
class Scores:
    """What scoring says about each row.

    Attributes
    ----------
    log_density : ndarray of shape (n_samples,)
        ``log p(x)`` under the mixture, in the data's own units.
    resp : ndarray of shape (n_samples, n_components)
        Responsibilities.
    component : ndarray of shape (n_samples,)
        Index of the most responsible component.
    segment : ndarray of shape (n_samples,)
        Stable segment id of that component.
    confidence : ndarray of shape (n_samples,)
        The largest responsibility.
    moments : PieceMoments or None
        The rows' per-segment moments, when learning was asked for them
        (:func:`shoal.core.learning.learn_rows`).
    """

    log_density: np.ndarray
    resp: np.ndarray
    component: np.ndarray
    segment: np.ndarray
    confidence: np.ndarray
    moments: object = None


class ScoreBuffer:
    """Preallocated outputs that blocks of rows are scored into.

    Parameters
    ----------
    n_samples : int
    n_components : int

    Attributes
    ----------
    resp_kn : ndarray of shape (n_components, n_samples)
        Log-joint, then responsibilities (components first: the reductions over
        components run along contiguous rows).
    log_density : ndarray of shape (n_samples,)
    component : ndarray of shape (n_samples,)
    confidence : ndarray of shape (n_samples,)
    """

    __slots__ = ("resp_kn", "log_density", "component", "confidence")

    def __init__(self, n_samples, n_components, arrays=None):
        if arrays is not None:
            self.resp_kn, self.log_density, self.component, self.confidence = arrays
            return
        self.resp_kn = np.empty((n_components, n_samples))
        self.log_density = np.empty(n_samples)
        self.component = np.empty(n_samples, dtype=np.intp)
        self.confidence = np.empty(n_samples)

    def put(self, rows, sub: "ScoreBuffer") -> None:
        """Copy the scores of ``sub`` into some of this buffer's rows.

        Parameters
        ----------
        rows : ndarray of shape (n_sub,)
        sub : ScoreBuffer
            Of ``n_sub`` rows.
        """
        self.resp_kn[:, rows] = sub.resp_kn
        self.log_density[rows] = sub.log_density
        self.component[rows] = sub.component
        self.confidence[rows] = sub.confidence

    def scores(self, ids, moments=None) -> Scores:
        """The buffer as :class:`Scores`.

        Parameters
        ----------
        ids : ndarray of shape (n_components,)
            Each component's segment id.
        moments : PieceMoments or None
            The rows' moments, if learning gave them.

        Returns
        -------
        scores : Scores
        """
        return Scores(
            log_density=self.log_density,
            resp=self.resp_kn.T,
            component=self.component,
            segment=ids[self.component],
            confidence=self.confidence,
            moments=moments,
        )


class ScoreScratch:
    """Score buffers reused from one call to the next (:meth:`Mixture.learn`'s
    ``scratch``): the scores a call returns are views into them, valid until the next
    call with the same scratch. A caller that learns piece after piece and is done with
    each piece's scores before the next (the ingest) spares the allocator a fresh
    quarter megabyte per piece, which costs more in page faults and cold caches than
    the arithmetic that fills it. Buffers are kept for the last few row counts.
    """

    KEEP = 4

    def __init__(self):
        self._buffers: dict = {}

    def buffer(self, n_samples: int, n_components: int) -> "ScoreBuffer":
        """A :class:`ScoreBuffer` of ``n_samples`` rows over this scratch's arrays.

        Parameters
        ----------
        n_samples, n_components : int

        Returns
        -------
        ScoreBuffer
        """
        key = (n_samples, n_components)
        arrays = self._buffers.pop(key, None)
        if arrays is None:
            arrays = ScoreBuffer(n_samples, n_components)
            arrays = (arrays.resp_kn, arrays.log_density, arrays.component, arrays.confidence)
            while len(self._buffers) >= self.KEEP:
                self._buffers.pop(next(iter(self._buffers)))
        self._buffers[key] = arrays      # most recently used last
        return ScoreBuffer(n_samples, n_components, arrays)


class Standardiser:
    """``(X - center) / scale`` for blocks of up to BLOCK_ROWS rows, into one reused buffer.

    On C-ordered rows the arithmetic runs over the flattened block against center and
    scale tiled to the block's length: one long vector loop instead of a short loop per
    row, with the same values as the broadcast expression. The result is a view of
    the buffer, valid until the next call.

    Parameters
    ----------
    center, scale : ndarray of shape (n_features,)
    """

    __slots__ = ("center", "scale", "_center", "_scale", "_buffer")

    def __init__(self, center, scale):
        self.center, self.scale = center, scale
        self._center = np.tile(center, BLOCK_ROWS)
        self._scale = np.tile(scale, BLOCK_ROWS)
        self._buffer = np.empty(BLOCK_ROWS * center.shape[0])

    def __call__(self, X):
        size = X.size
        if size > self._buffer.size or not X.flags.c_contiguous:
            return (X - self.center) / self.scale
        z = self._buffer[:size]
        np.subtract(X.reshape(-1), self._center[:size], out=z)
        np.divide(z, self._scale[:size], out=z)
        return z.reshape(X.shape)


def checked_rows(mixture, X, check: bool = True) -> np.ndarray:
    """``X`` as float64 rows of the mixture's width; with ``check``, also finite.

    Parameters
    ----------
    mixture : Mixture
    X : array-like of shape (n_samples, n_features)
    check : bool
        Refuse non-finite values (:class:`shoal.core.missing.MissingValues`). The
        compiled path passes False: its design kernel checks every value it reads.

    Returns
    -------
    X : ndarray of shape (n_samples, n_features)
    """
    X = np.asarray(X, dtype=np.float64)
    if X.ndim != 2 or X.shape[1] != mixture.n_features:
        raise ModelError(
            f"X should have shape (n_samples, {mixture.n_features}), got {X.shape}"
        )
    # a finite sum means finite rows (one pass, no temporary); if the sum is not
    # finite, look row by row (a sum of huge finite values can overflow)
    if check and not np.isfinite(np.sum(X)) and not np.all(np.isfinite(X)):
        raise not_finite()
    return X


def normalise(resp, out, lo, hi, log_scale_sum) -> None:
    """Log-joint -> responsibilities in place; the other scores of rows ``lo:hi``.

    Parameters
    ----------
    resp : ndarray of shape (n_components, hi - lo)
        The rows' log-joint; their responsibilities on return.
    out : ScoreBuffer
        Gets ``log_density``, ``component`` and ``confidence`` of rows ``lo:hi``.
    lo, hi : int
    log_scale_sum : float
        ``sum(log scale)``: standardised to data-unit log-density.
    """
    n_components = resp.shape[0]
    top = np.max(resp, axis=0)
    resp -= top
    # The most responsible component now sits at exactly 0 (first one on ties).
    rank = (resp == 0.0) * np.arange(n_components - 1, -1, -1, dtype=np.int16)[:, None]
    out.component[lo:hi] = n_components - 1 - np.max(rank, axis=0)
    # Clamp at e^-230 (1e-100): as subnormal numbers, far smaller
    # responsibilities would slow every later GEMM a hundredfold.
    np.maximum(resp, -230.0, out=resp)
    np.exp(resp, out=resp)
    total = np.sum(resp, axis=0)
    resp /= total
    out.log_density[lo:hi] = np.log(total) + top - log_scale_sum
    np.divide(1.0, total, out=out.confidence[lo:hi])


def score_design(mixture, A, out, lo, operator) -> None:
    """Score the rows of a design matrix into ``out``.

    Parameters
    ----------
    mixture : Mixture
    A : ndarray of shape (n_rows, width)
    out : ScoreBuffer
        Gets the scores at rows ``lo .. lo + n_rows``.
    lo : int
    operator : object
        The family's scoring operator.
    """
    hi = lo + A.shape[0]
    resp = out.resp_kn[:, lo:hi]
    mixture.family.log_joint(A, operator, out=resp)
    normalise(resp, out, lo, hi, mixture.log_scale_sum)


def score_block(mixture, Zb, out, lo) -> np.ndarray:
    """Score a block of standardised rows into ``out``.

    Parameters
    ----------
    mixture : Mixture
    Zb : ndarray of shape (n_rows, n_features)
    out : ScoreBuffer
        Gets the scores at rows ``lo .. lo + n_rows``.
    lo : int

    Returns
    -------
    A : ndarray of shape (n_rows, width)
        The block's design matrix, for :func:`accumulate`.
    """
    A = mixture.family.design(Zb)
    score_design(mixture, A, out, lo, mixture.scoring_operator)
    return A


def score_span(mixture, X, lo, hi, out, operator, rows=None) -> np.ndarray:
    """Score rows ``lo:hi`` of ``X`` block by block into ``out``.

    Parameters
    ----------
    mixture : Mixture
    X : ndarray of shape (n_samples, n_features)
        Data-unit rows with ``rows`` (a :class:`Standardiser`), else standardised rows.
    lo, hi : int
    out : ScoreBuffer
    operator : object
        The family's scoring operator.
    rows : Standardiser or None

    Returns
    -------
    A : ndarray of shape (hi - lo, width)
        The span's design matrix.
    """
    family = mixture.family
    A = np.empty((hi - lo, family.width(mixture.n_features)))
    for a in range(lo, hi, BLOCK_ROWS):
        b = min(a + BLOCK_ROWS, hi)
        Zb = X[a:b] if rows is None else rows(X[a:b])
        Ab = family.design(Zb, out=A[a - lo : b - lo])
        score_design(mixture, Ab, out, a, operator)
    return A


def score_standardised(mixture, Z, moments_weight=None):
    """Score standardised rows; with ``moments_weight`` also their batch statistics.

    Parameters
    ----------
    mixture : Mixture
    Z : ndarray of shape (n_samples, n_features)
        Finite standardised rows.
    moments_weight : float or None
        The weight of every row in the statistics (``1 / n_samples`` for a batch
        E-step).

    Returns
    -------
    out : ScoreBuffer
    statistics : tuple of ndarray, only with ``moments_weight``
        ``(s0, s1, s2)`` of shapes (n_components,), (n_components, n_features) and the
        covariance type's second-moment shape.
    """
    n = Z.shape[0]
    out = ScoreBuffer(n, mixture.n_components)
    if fused.enabled():
        if moments_weight is None:
            fused.compiled_span(mixture, Z, 0, n, out, data_units=False)
            return out
        return out, fused.compiled_span(mixture, Z, 0, n, out, data_units=False,
                                        row_w=np.full(n, moments_weight))
    operator = mixture.scoring_operator
    total = None
    for lo in range(0, n, SPAN_ROWS):
        hi = min(lo + SPAN_ROWS, n)
        A = score_span(mixture, Z, lo, hi, out, operator)
        if moments_weight is not None:
            part = mixture.family.moments(A, out.resp_kn[:, lo:hi] * moments_weight)
            total = part if total is None else tuple(a + b for a, b in zip(total, part))
    if moments_weight is None:
        return out
    return out, total


def accumulate(mixture, A, resp_kn, row_w):
    """Weighted statistics ``(s0, s1, s2)`` of a block with design matrix ``A``.

    Parameters
    ----------
    mixture : Mixture
    A : ndarray of shape (n_samples, width)
    resp_kn : ndarray of shape (n_components, n_samples)
        Responsibilities; those below the mixture's ``resp_floor`` count as zero.
    row_w : ndarray of shape (n_samples,)

    Returns
    -------
    s0 : ndarray of shape (n_components,)
    s1 : ndarray of shape (n_components, n_features)
    s2 : ndarray, the covariance type's second-moment shape
    """
    return mixture.family.weighted_moments(A, resp_kn, row_w, mixture.resp_floor)
