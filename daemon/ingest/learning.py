"""The model's learning, shared by ingest and backfill: the first model and the steps.

:func:`warm_up` fits the first model once ``warmup_rows`` complete rows are at hand
(k-means++ and batch EM, or a BIC choice of the number of segments) and learns the
rows after them; :func:`learn_chunks` learns rows in pieces that never cross a drift
window or a lifecycle decision point, showing each piece to the segment watch;
:func:`after_scoring` moves the unusual-row threshold and the per-segment row
counts; :func:`history_rows` gives a model version's segment history. These are
functions of the settings and the rows: the thread that calls them owns the model.
"""
from __future__ import annotations

import logging
import threading
from typing import TYPE_CHECKING, Callable

import numpy as np

from shoal.config import Settings
from shoal.core import (
    FeatureTransforms,
    Mixture,
    ModelError,
    NotEnoughDataError,
    StepSchedule,
    initialise,
    select_n_components,
)
from shoal.core.piece_tallies import piece_tallies
from shoal.core.quantile import linear_quantile
from shoal.core.scoring import ScoreScratch
from shoal.daemon.errors import InputRejected, Interrupted
from shoal.daemon.files.gaps import Unusual, complete_rows, observed_counts
from shoal.daemon.ingest.rows import ScoresInto, complete_only, concat_scores
from shoal.daemon.model import transforming
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.segments.life_rows import SAMPLE_STRIDE
from shoal.daemon.state.store import HistoryRow

if TYPE_CHECKING:
    from shoal.daemon.segments.monitor import InputWatch
    from shoal.daemon.segments.segment_life import LifeWatch

__all__ = ["UNUSUAL_MEMORY_ROWS", "raise_if_stopped", "step_schedule", "observed_floor", "warm_up",
           "learn_chunks", "show_piece", "after_scoring", "count_rows", "with_born", "history_rows"]

# A learned input moves the unusual-row threshold this far towards its own quantile:
# weight n / (n + UNUSUAL_MEMORY_ROWS), i.e. the threshold follows roughly the last
# UNUSUAL_MEMORY_ROWS rows.
UNUSUAL_MEMORY_ROWS = 50_000


def raise_if_stopped(stop: threading.Event | None) -> None:
    """Raise :class:`Interrupted` if ``stop`` is set (the input is abandoned
    uncommitted)."""
    if stop is not None and stop.is_set():
        raise Interrupted("stop requested")


def step_schedule(settings: Settings) -> StepSchedule:
    """The step schedule of a new model (``learning.step_exponent``, the half-life)."""
    return StepSchedule(alpha=settings.learning.step_exponent, i0=None,
                        half_life_rows=settings.half_life_rows)


def observed_floor(settings: Settings) -> int:
    """Features a row needs present to be scored and learned (``min_observed``)."""
    return settings.learning.observed_floor(len(settings.features))


def warm_up(settings: Settings, X: np.ndarray, buffered: np.ndarray | None,
            stop: threading.Event | None = None, watch: InputWatch | None = None,
            life: LifeWatch | None = None):
    """Buffer rows until ``warmup_rows``; then fit the first model.

    ``buffered`` holds the rows buffered before ``X`` (transformed); a set ``stop``
    abandons the work (:func:`raise_if_stopped`). Returns
    ``(mixture or None, scores or None, rows to add to the buffer, checkpoint extras of
    the new model)``: with a model, the scores are those of every row of ``X`` (the
    rows after the first ``warmup_rows`` complete ones learned, shown to ``watch`` and
    ``life``).
    """
    s = settings
    if buffered is None:
        buffered = np.empty((0, X.shape[1]))
    # the first model is fitted on complete rows only: warmup_rows of them
    have = int(np.count_nonzero(observed_counts(buffered) == X.shape[1]))
    complete_x = np.cumsum(observed_counts(X) == X.shape[1])
    if have + (int(complete_x[-1]) if len(X) else 0) < s.warmup_rows:
        return None, None, X, {}
    need = int(np.searchsorted(complete_x, s.warmup_rows - have) + 1) \
        if have < s.warmup_rows else 0
    Xw = complete_rows(np.concatenate([buffered, X[:need]]))
    raise_if_stopped(stop)
    try:
        if s.segments.fixed:
            mixture = initialise(Xw, n_components=s.segments.min, covariance=s.covariance,
                                 seed=s.seed, n_init=s.learning.n_init,
                                 schedule=step_schedule(s), reg_covar=s.learning.reg_covar,
                                 refresh_rows=s.learning.refresh_rows)
            table = None
        else:
            mixture, table = select_n_components(
                Xw, s.segments.min, s.segments.max, covariance=s.covariance, seed=s.seed,
                n_init=s.learning.n_init, schedule=step_schedule(s),
                reg_covar=s.learning.reg_covar,
                refresh_rows=s.learning.refresh_rows)
    except NotEnoughDataError as exc:
        log_event("warmup_not_enough_data", logging.WARNING, rows=len(Xw), detail=str(exc))
        return None, None, X, {}
    log_event("model_initialised", rows=len(Xw), segments=int(mixture.n_components),
              covariance=s.covariance,
              bic=[{k: (float(v) if k != "n_components" else int(v)) for k, v in r.items()}
                   for r in table] if table else None)
    head = mixture.score(X[:need])
    extra = Unusual.at_warm_up(mixture, Xw, s.output.unusual_quantile, observed_floor(s),
                               s.seed).to_extra({})
    if watch is not None:
        watch.start(stream_offset=len(buffered) + need)
        watch.unusual_below = extra["unusual_below"]
        if watch.times is not None:
            watch.times = watch.times[need:]
    if life is not None:
        life.start(stream_offset=len(buffered) + need)
    mixture, tail = learn_chunks(settings, mixture, X[need:], watch, life, stop)
    return mixture, concat_scores(head, tail), None, extra


def learn_chunks(settings: Settings, mixture: Mixture, X: np.ndarray,
                 watch: InputWatch | None = None, life: LifeWatch | None = None,
                 stop: threading.Event | None = None):
    """Learn ``X`` in pieces of at most ``chunk_rows`` that never cross a drift window
    boundary (learning does not depend on the cut), showing each piece to ``watch``;
    ``life`` takes its lifecycle decisions at its own fixed points between pieces.
    Returns the mixture after ``X`` and the scores of its rows (None without rows)."""
    joined = ScoresInto(len(X))
    # each piece's scores are done with before the next piece: its buffers are reused
    scratch = ScoreScratch()
    step = settings.learning.chunk_rows
    start = 0
    try:
        while start < len(X):
            raise_if_stopped(stop)
            take = min(step, len(X) - start)
            if watch is not None:
                take = min(take, watch.rows_to_boundary(mixture.n_rows))
            if life is not None:
                mixture = life.at_boundary(mixture, watch)
                take = min(take, life.rows_to_boundary(mixture))
            piece = X[start:start + take]
            before = mixture
            mixture, scores = mixture.learn(piece, moments=watch is not None, scratch=scratch)
            if watch is not None or life is not None:
                show_piece(watch, life, before, mixture, piece, scores, start)
            joined.put(start, scores)
            start += take
    except (ModelError, np.linalg.LinAlgError) as exc:
        raise InputRejected("model_update_failed", f"the model could not learn from this "
                            f"input: {exc}") from exc
    return mixture, joined.scores()


def show_piece(watch: InputWatch | None, life: LifeWatch | None, before: Mixture,
               mixture: Mixture, piece: np.ndarray, scores, start: int) -> None:
    """Show a learned piece (rows ``start..`` of the input's learned rows) to the segment
    watch: its scores tallied once for both (:func:`shoal.core.piece_tallies.piece_tallies`),
    ``before`` the model that scored it and ``mixture`` the model after it."""
    # without the lifecycle no row is sampled (the first sampled row is past the piece)
    near, first = life.tally_bounds(before) if life is not None else (None, len(piece))
    kept = complete_only(piece, scores) if life is not None else scores
    both = life is not None and kept is scores
    tallies = piece_tallies(scores.log_density, scores.component, piece, before.center,
                            before.n_components,
                            unusual_below=None if watch is None else watch.unusual_bound,
                            near_below=near if both else None, first=first,
                            stride=SAMPLE_STRIDE, sample=both)
    if watch is not None:
        watch.observe(mixture, piece, scores, start, tallies)
    if life is not None:
        if not both:   # rows that miss a feature are neither unexplained nor sampled
            tallies = piece_tallies(kept.log_density, kept.component, piece, before.center,
                                    before.n_components, near_below=near, first=first,
                                    stride=SAMPLE_STRIDE, sample=True)
        life.observe(before, piece, kept, tallies)


def count_rows(extra: dict, segments: list[np.ndarray]) -> dict:
    """``extra`` with ``segments`` (rows' segment ids) added to its per-segment counts."""
    if not segments or not sum(len(s) for s in segments):
        return extra
    counts = dict(extra.get("segment_rows", {}))
    ids, n = np.unique(np.concatenate(segments), return_counts=True)
    for sid, k in zip(ids.tolist(), n.tolist()):
        counts[str(sid)] = counts.get(str(sid), 0) + int(k)
    return dict(extra, segment_rows=counts)


def after_scoring(settings: Settings, extra: dict, scores, mixture: Mixture,
                  observed: np.ndarray | None = None) -> dict:
    """``extra`` after rows were scored and learned: their segments counted, and the
    unusual-row thresholds moved towards the quantile of their log-densities (weight
    n / (n + UNUSUAL_MEMORY_ROWS))."""
    extra = count_rows(dict(extra), [scores.segment])
    q = settings.output.unusual_quantile
    if len(scores.log_density) and "unusual_below" in extra:
        unusual = Unusual.from_extra(extra).follow(
            scores.log_density, observed, mixture.n_features, q, UNUSUAL_MEMORY_ROWS,
            linear_quantile)
        extra = unusual.to_extra(extra)
    return extra


def with_born(extra: dict, mixture: Mixture, version: int,
              wall: Callable[[], float]) -> dict:
    """``extra`` with the model version and time (``wall()``) at which each segment
    first existed."""
    extra = dict(extra)
    born = dict(extra.get("segment_born", {}))
    for sid in mixture.ids.tolist():
        born.setdefault(str(sid), {"version": version, "time": wall()})
    extra["segment_born"] = born
    return extra


def history_rows(mixture: Mixture, extra: dict, drift: dict | None = None,
                 transforms: FeatureTransforms | None = None) -> list[HistoryRow]:
    """The per-segment history rows of a model version (in the data's units)."""
    means, stds = transforming.history_units(transforms, mixture.data_means(),
                                             mixture.data_stds())
    counts = extra.get("segment_rows", {})
    drift = drift or {}
    return [HistoryRow(segment=int(sid), weight=float(mixture.weights[k]),
                       rows=int(counts.get(str(int(sid)), 0)), mean=means[k].tolist(),
                       spread=stds[k].tolist(), drift=drift.get(str(int(sid))))
            for k, sid in enumerate(mixture.ids.tolist())]
