"""A learned piece's per-segment moments, taken from the M-step's own statistics.

The drift watch keeps, per segment and window, ``T = sum_i r_ik``, ``Q = sum_i r_ik^2``,
``M = sum_i r_ik (x_i - c)`` and ``S = sum_i r_ik (x_i - c)(x_i - c)^T``
(:mod:`shoal.core.window_statistics`). The second moments are the costly part: a
gather and a product per segment over the rows, which the stepwise M-step has just
done for its own statistics ``b0 = sum_i w_i r_ik``, ``b1`` and ``b2`` (standardised
rows ``z``, row weights ``w_i`` of the step schedule, responsibilities under the
mixture's ``resp_floor`` left out). Rather than a second pass, each span between
refresh points gives

``M_k = b1_k * scale * T_k / b0_k`` and ``S_k = b2_k * (scale scale^T) * T_k / b0_k``,

the sums are kept with the M-step's row weights made positional: ``B_k = b0_k / u``,
``M_k = b1_k * scale / u`` and ``S_k = b2_k * (scale scale^T) / u``, where ``u``
(:meth:`shoal.core.schedule.StepSchedule.cell_unit`) turns a row's weight into one
that depends only on its place after the last refresh point before it: 1 at that
point, growing as the schedule's steps shrink the older rows (by 6% over 4,096 rows
at the default half-life of 50,000 rows; a tilt that changes Kish's effective rows by
well under 0.1%). The window's mean is ``M / B`` and its second moment ``S / B``:
the same estimates as unweighted sums, slightly tilted towards the newer rows, and
the same however the stream is cut into pieces. ``T`` and ``Q`` are exact.
"""
from __future__ import annotations

import functools
from dataclasses import dataclass, field

import numpy as np

__all__ = ["PieceMoments"]


@dataclass
class PieceMoments:
    """Per-segment moments of a learned piece, rows centred on the model's centre.

    Attributes
    ----------
    T, Q : ndarray of shape (n_components,)
        Responsibility totals and totals of their squares.
    B : ndarray of shape (n_components,)
        The positionally weighted responsibility totals that ``M`` and ``S`` divide by.
    M : ndarray of shape (n_components, n_features)
    S : ndarray of shape (n_components, n_features, n_features)
        Full: the weighted scatter; diag: only the diagonal is filled.
    """

    T: np.ndarray
    Q: np.ndarray
    B: np.ndarray
    M: np.ndarray
    S: np.ndarray
    _scale: np.ndarray | None = field(default=None, repr=False)

    @classmethod
    def empty(cls, n_components: int, n_features: int, scale) -> "PieceMoments":
        """Zero moments.

        Parameters
        ----------
        n_components, n_features : int
        scale : ndarray of shape (n_features,)
            The model's scale (standardised to data units), for :meth:`add_span`.

        Returns
        -------
        PieceMoments
        """
        K, D = n_components, n_features
        out = cls(np.zeros(K), np.zeros(K), np.zeros(K), np.zeros((K, D)), np.zeros((K, D, D)))
        out._scale = np.asarray(scale, dtype=np.float64)
        return out

    @classmethod
    def of_span(cls, resp_kn: np.ndarray, b0: np.ndarray, b1: np.ndarray, b2: np.ndarray,
                unit: float, scale, sums=None) -> "PieceMoments":
        """The moments of a first span: :meth:`empty` and :meth:`add_span` in one, the
        arrays made from the span's own (a piece between refresh points, the usual
        case, is one span).

        Parameters
        ----------
        resp_kn, b0, b1, b2, unit, sums
            As for :meth:`add_span`; the arrays of ``sums`` are taken over, not copied.
        scale : ndarray of shape (n_features,)
            As for :meth:`empty`.

        Returns
        -------
        PieceMoments
        """
        scale = np.asarray(scale, dtype=np.float64)
        out = cls(*_span_terms(resp_kn, b0, b1, b2, unit, scale, sums))
        out._scale = scale
        return out

    def add_span(self, resp_kn: np.ndarray, b0: np.ndarray, b1: np.ndarray, b2: np.ndarray,
                 unit: float, sums=None) -> None:
        """Add a span's moments from its responsibilities and its M-step statistics.

        Parameters
        ----------
        resp_kn : ndarray of shape (n_components, n_rows)
            The span's responsibilities.
        b0 : ndarray of shape (n_components,)
        b1 : ndarray of shape (n_components, n_features)
        b2 : ndarray of shape (n_components, n_features, n_features) or (n_components, n_features)
            The span's weighted statistics in standardised units (full or diag).
        unit : float
            :meth:`shoal.core.schedule.StepSchedule.cell_unit` of the span.
        sums : tuple of two ndarray of shape (n_components,), optional
            The span's responsibility totals and totals of their squares, when the
            scoring summed them (:func:`shoal.core.fused.compiled_span`); else they are
            summed here from ``resp_kn``.
        """
        terms = _span_terms(resp_kn, b0, b1, b2, unit, self._scale, sums)
        for total, term in zip((self.T, self.Q, self.B, self.M, self.S), terms):
            total += term


def _span_terms(resp_kn, b0, b1, b2, unit, scale, sums):
    """A span's ``T, Q, B, M, S`` as new arrays (``sums`` taken over when given): what
    :meth:`PieceMoments.of_span` starts from and :meth:`PieceMoments.add_span` adds."""
    if sums is not None:
        T, Q = sums
    else:
        ones = _ones(resp_kn.shape[1])
        # row sums as matrix-vector products: one BLAS call each, not a reduction
        T, Q = resp_kn @ ones, (resp_kn * resp_kn) @ ones
    M = b1 * (scale / unit)
    if b2.ndim == 3:
        S = b2 * (_outer(scale.tobytes()) / unit)
    else:   # diag: the variances on the diagonal, the rest zero
        K, D = b2.shape
        S = np.zeros((K, D, D))
        at = np.arange(D)
        S[:, at, at] = b2 * (scale * scale / unit)
    return T, Q, b0 / unit, M, S


@functools.lru_cache(maxsize=8)
def _outer(scale: bytes) -> np.ndarray:
    """``scale scale^T`` (read-only) for the few scales in use: the scale is frozen at
    warm-up, and the moments are scaled at every span."""
    scale = np.frombuffer(scale)
    out = np.outer(scale, scale)
    out.flags.writeable = False
    return out


@functools.lru_cache(maxsize=4)
def _ones(n: int) -> np.ndarray:
    """A read-only vector of ``n`` ones (spans have a handful of lengths)."""
    ones = np.ones(n)
    ones.flags.writeable = False
    return ones
