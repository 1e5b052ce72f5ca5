"""Rows with missing features: which rows count, how many features each has, and the
unusual-row thresholds by that number.

A feature is missing when its value is null, NaN or empty (the reader makes all three
NaN). A row with at least ``learning.min_observed`` features present is valid: the core
scores it by the marginal over the features it has and learns from it by EM with
missing data. Rows with fewer, or with a present value out of bounds, stay invalid.

``unusual`` compares like with like. The log-density of a row with ``c`` features
present is a density over ``c`` dimensions, not comparable with one over all of them,
so each count ``c`` has its own threshold: at warm-up, the ``unusual_quantile`` of the
log-densities of the warm-up's complete rows with ``D - c`` features hidden at random
(seeded); afterwards each threshold follows the quantile of the rows learned with that
count, as the complete rows' threshold does (weight n / (n + memory)).
"""

from __future__ import annotations

import numpy as np

from shoal.core import fused
from shoal.daemon.files.frame import FEATURE_BOUND, Frame

__all__ = ["admit", "observed_counts", "frame_observed", "Unusual", "complete_rows"]


def observed_counts(X: np.ndarray) -> np.ndarray:
    """Features present (not NaN) per row of ``X`` (n, D), as int64. One compiled pass
    finds the rows with a NaN where the kernels are built (unless a value is infinite);
    only those are counted."""
    n, D = X.shape
    out = np.full(n, D, dtype=np.int64)
    if fused.enabled() and X.flags.c_contiguous and X.dtype == np.float64:
        rows, off = np.empty(n, dtype=np.int64), np.empty(n + 1, dtype=np.int64)
        count = fused.kernels().gap_index(X, rows, off, np.empty(n * D, dtype=np.int64))
        if count >= 0:
            out[rows[:count]] = D - np.diff(off[: count + 1])
            return out
    idx = np.flatnonzero(~np.isfinite(np.add.reduce(X, axis=1)))
    if idx.size:
        out[idx] = D - np.count_nonzero(np.isnan(X[idx]), axis=1)
    return out


def frame_observed(frame: Frame) -> np.ndarray:
    """:func:`observed_counts` of a frame's rows (computed once per frame)."""
    if frame.observed is None:
        frame.observed = observed_counts(frame.features)
    return frame.observed


def admit(frame: Frame, floor: int, model_range=None) -> int:
    """Mark valid the rows of ``frame`` that are invalid only for missing values and have
    at least ``floor`` features present, each within the reader's bound (and within
    ``model_range`` ``(center, limit)``, if given). Returns how many were admitted."""
    bad = np.flatnonzero(~frame.valid)
    if bad.size == 0:
        return 0
    sub = frame.features[bad]
    nan = np.isnan(sub)
    gappy = nan.any(axis=1)
    if not gappy.any():
        return 0
    with np.errstate(invalid="ignore"):
        fine = np.abs(sub) <= FEATURE_BOUND
        if model_range is not None:
            center, limit = model_range
            fine &= np.abs(sub - center) <= limit
    ok = gappy & np.all(fine | nan, axis=1) & ((~nan).sum(axis=1) >= floor)
    frame.valid[bad[ok]] = True
    return int(np.count_nonzero(ok))


def complete_rows(X: np.ndarray) -> np.ndarray:
    """The rows of ``X`` with every feature present."""
    keep = observed_counts(X) == X.shape[1]
    return X if keep.all() else X[keep]


class Unusual:
    """The unusual-row thresholds: ``below`` for complete rows and ``by_observed[c]`` for
    rows with ``c`` features present (None where not known: such rows are never unusual).

    Kept in the checkpoint's extras as ``unusual_below`` and ``unusual_below_observed``.
    """

    def __init__(self, below: float, by_observed=None):
        self.below = float(below)
        self.by_observed = None if by_observed is None else list(by_observed)

    @classmethod
    def from_extra(cls, extra: dict) -> "Unusual":
        return cls(extra.get("unusual_below", -np.inf), extra.get("unusual_below_observed"))

    def to_extra(self, extra: dict) -> dict:
        extra = dict(extra)
        extra["unusual_below"] = self.below
        if self.by_observed is not None:
            extra["unusual_below_observed"] = self.by_observed
        return extra

    def per_row(self, observed: np.ndarray | None, n_features: int):
        """The threshold for each row with ``observed`` features present (a float when
        every row is complete)."""
        if observed is None:
            return self.below
        gappy = observed < n_features
        if not gappy.any():
            return self.below
        table = np.full(n_features + 1, -np.inf)
        if self.by_observed is not None:
            for c, value in enumerate(self.by_observed[: n_features + 1]):
                if value is not None:
                    table[c] = value
        table[n_features] = self.below
        return table[observed]

    @classmethod
    def at_warm_up(cls, mixture, X: np.ndarray, q: float, floor: int, seed: int) -> "Unusual":
        """Thresholds from the warm-up's complete rows ``X`` (see the module docstring)."""
        D = X.shape[1]
        below = float(np.quantile(mixture.score(X).log_density, q))
        by = [None] * (D + 1)
        rng = np.random.default_rng([seed, 0x6A95])
        order = np.argsort(rng.random(X.shape), axis=1)
        for c in range(max(floor, 1), D):
            hidden = X.copy()
            np.put_along_axis(hidden, order[:, : D - c], np.nan, axis=1)
            by[c] = float(np.quantile(mixture.score(hidden).log_density, q))
        by[D] = below
        return cls(below, by)

    def follow(self, log_density, observed, n_features, q, memory, quantile) -> "Unusual":
        """Each threshold moved towards the ``quantile(values, q)`` of the rows learned
        with its count, by weight n / (n + memory)."""
        def moved(old, values):
            w = len(values) / (len(values) + memory)
            return float(old + w * (quantile(values, q) - old))

        if observed is None or (observed == n_features).all():
            complete = log_density
        else:
            complete = log_density[observed == n_features]
        below = moved(self.below, complete) if len(complete) else self.below
        by = self.by_observed
        if by is not None and observed is not None:
            by = list(by)
            counts = np.bincount(observed, minlength=n_features + 1)
            for c in np.flatnonzero(counts[:n_features]).tolist():
                if by[c] is not None:
                    by[c] = moved(by[c], np.ascontiguousarray(log_density[observed == c]))
            by[n_features] = below
        return Unusual(below, by)
