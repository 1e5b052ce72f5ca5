"""Which rows of a frame the model takes, and the scores of rows, cut and joined.

Rows with missing features are admitted when enough features are present
(``learning.min_observed``); once a model exists, rows further than
:data:`MODEL_RANGE_SDS` warm-up standard deviations from the warm-up mean are
marked invalid. :class:`RowCount` counts the rows that pass. Shared by the
learning stages, duplicates and labels-only runs.
"""
from __future__ import annotations

import logging
from dataclasses import replace
from typing import Iterable

import numpy as np

from shoal.core import Mixture
from shoal.daemon.files.gaps import admit, observed_counts
from shoal.daemon.files.readers import Frame
from shoal.daemon.runtime.logs import log_event

__all__ = ["MODEL_RANGE_SDS", "model_range", "mark_beyond_model", "admit_rows", "RowCount",
           "ScoresInto",
           "valid_rows", "keep_rows", "complete_only", "rows_of", "concat_scores"]

MODEL_RANGE_SDS = 1e6
"""Rows further than this many warm-up standard deviations from the warm-up mean, in any
feature, are invalid once a model exists: finite values that large (a sensor's overflow,
a corrupt number) would swamp the second-moment statistics, which then no longer give a
positive-definite covariance, and every later refresh of the model would fail."""


def model_range(mixture: Mixture) -> tuple[np.ndarray, np.ndarray]:
    """``(center, limit)``: a feature further than ``limit`` from ``center`` is beyond
    MODEL_RANGE_SDS of ``mixture``'s scale (both frozen at warm-up)."""
    return mixture.center, MODEL_RANGE_SDS * mixture.scale


def mark_beyond_model(frame: Frame, mixture: Mixture) -> None:
    """Mark invalid the rows of ``frame`` beyond MODEL_RANGE_SDS of ``mixture``'s scale
    (the reader did it already when it read the frame with this model's range)."""
    if frame.n_rows == 0:
        return
    center, limit = model_range(mixture)
    checked = frame.model_range
    if checked is not None and np.array_equal(checked[0], center) and \
            np.array_equal(checked[1], limit):
        far = frame.beyond_range
    else:
        with np.errstate(invalid="ignore"):   # NaN features (already invalid) compare False
            beyond = np.any(np.abs(frame.features - center) > limit, axis=1)
        beyond &= frame.valid
        far = int(np.count_nonzero(beyond))
        if far:
            frame.valid[beyond] = False
    if far:
        log_event("rows_beyond_model_range", logging.WARNING, rows=far,
                  limit_sds=MODEL_RANGE_SDS)


def admit_rows(frame: Frame, floor: int | None, mixture: Mixture | None) -> None:
    """Rows of ``frame`` with missing features but ``floor`` present made valid."""
    if floor is not None:
        admit(frame, floor, None if mixture is None else model_range(mixture))


class RowCount:
    """Rows, rows without a segment and rows outside a transform's domain of the frames
    that went through :meth:`counted` (or were added with :meth:`add`)."""

    def __init__(self):
        self.rows = self.invalid = self.outside = 0

    def add(self, frame: Frame) -> None:
        self.rows += frame.n_rows
        self.invalid += frame.n_invalid
        self.outside += frame.outside_domain

    def counted(self, frames: Iterable[Frame], mixture: Mixture | None = None,
                floor: int | None = None):
        """The frames, counted; rows with missing features admitted (with ``floor``) and,
        with a model, rows beyond its range marked invalid first (as when they are
        learned, so a duplicate's labels equal the original's)."""
        for frame in frames:
            admit_rows(frame, floor, mixture)
            if mixture is not None:
                mark_beyond_model(frame, mixture)
            self.add(frame)
            yield frame


def valid_rows(frame: Frame) -> np.ndarray:
    """The feature rows of ``frame`` that are valid."""
    return frame.features if frame.n_invalid == 0 else frame.features[frame.valid]


def keep_rows(frames: Iterable[Frame], into: list[tuple]):
    """The frames; their valid rows and validity added to ``into`` as they pass."""
    for frame in frames:
        into.append((valid_rows(frame).copy(), frame.valid.copy()))
        yield frame


def complete_only(X: np.ndarray, scores):
    """``scores`` with the rows of ``X`` that miss a feature at log-density +inf: their
    marginal densities are over fewer features, not comparable (never unexplained)."""
    if scores.moments is not None:   # learning gives moments for complete rows only
        return scores
    gappy = observed_counts(X) < X.shape[1]
    if not gappy.any():
        return scores
    return replace(scores, log_density=np.where(gappy, np.inf, scores.log_density))


# the fields of Scores with one entry per row (a piece's moments are not cut or joined)
_ROW_FIELDS = ("log_density", "resp", "component", "segment", "confidence")


def rows_of(scores, start: int, stop: int):
    """Rows ``start:stop`` of ``scores``."""
    return type(scores)(**{name: getattr(scores, name)[start:stop] for name in _ROW_FIELDS})


def concat_scores(*parts):
    """Scores of consecutive rows joined (None parts left out), without their
    responsibilities: nothing after learning reads them, and joined they would be the
    largest array of an input (``rows * K`` doubles; segments born, retired or merged
    between the parts would make their columns mean nothing anyway)."""
    parts = [p for p in parts if p is not None]
    if len(parts) == 1:
        return parts[0]
    joined, at = ScoresInto(sum(len(p.segment) for p in parts)), 0
    for p in parts:
        joined.put(at, p)
        at += len(p.segment)
    return joined.scores()


class ScoresInto:
    """The scores of ``n_rows`` consecutive rows, written piece by piece into arrays
    made once (joining hundreds of pieces' arrays at the end cost as much again), without
    responsibilities."""

    def __init__(self, n_rows: int):
        self.n_rows = n_rows
        self.arrays: dict | None = None
        self.first = None

    def put(self, at: int, scores) -> None:
        """Rows ``at..`` get ``scores``."""
        if self.arrays is None:
            self.first = scores
            self.arrays = {name: np.empty(self.n_rows, dtype=getattr(scores, name).dtype)
                           for name in _ROW_FIELDS if name != "resp"}
        end = at + len(scores.segment)
        arrays = self.arrays
        arrays["log_density"][at:end] = scores.log_density
        arrays["component"][at:end] = scores.component
        arrays["segment"][at:end] = scores.segment
        arrays["confidence"][at:end] = scores.confidence

    def scores(self):
        """The joined scores (None if no piece was put)."""
        if self.arrays is None:
            return None
        return type(self.first)(resp=np.empty((self.n_rows, 0)), **self.arrays)
