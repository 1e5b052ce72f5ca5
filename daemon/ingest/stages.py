"""The stages one input's frames pass, each an iterator of frames in and out.

read (:func:`read_frames`: record batches to frames, in a reader thread a few
frames ahead) -> claimed (:func:`until_claimed`: stops once the content turns out
not to be new) -> check, score and learn (:class:`InputLearning`: rows admitted,
the model learned and the segments watched, frames held until their rows are
scored) -> label (:meth:`InputLearning.labelled`, :func:`scored_tables` for a
fixed model) -> the labels writer. The thread that pulls the chain owns the model;
nothing downstream calls back upstream.
"""
from __future__ import annotations

import logging
import threading
from dataclasses import replace
from typing import TYPE_CHECKING, BinaryIO, Iterable, Iterator

import numpy as np
import pyarrow as pa

from shoal.config import Settings
from shoal.core import Mixture
from shoal.daemon.files.gaps import Unusual, frame_observed, observed_counts
from shoal.daemon.files.labels_schema import Conformer
from shoal.daemon.files.readers import BATCH_ROWS, Frame, iter_frames, prefetch
from shoal.daemon.files.times import RowTimes, row_times
from shoal.daemon.files.writer import labels_table
from shoal.daemon.ingest.claim import Claim
from shoal.daemon.ingest.learning import (
    after_scoring,
    learn_chunks,
    observed_floor,
    raise_if_stopped,
    warm_up,
)
from shoal.daemon.ingest.results import ModelState
from shoal.daemon.ingest.rows import (
    RowCount,
    admit_rows,
    mark_beyond_model,
    model_range,
    rows_of,
    valid_rows,
)
from shoal.daemon.model import transforming
from shoal.daemon.runtime.logs import log_event

if TYPE_CHECKING:
    from shoal.daemon.segments.monitor import InputWatch
    from shoal.daemon.segments.segment_life import LifeWatch

__all__ = ["READ_AHEAD_BYTES", "frames_ahead", "read_frames", "until_claimed", "stop_checked", "InputLearning", "TimeColumn",
           "scored_tables", "frame_labels"]


READ_AHEAD_BYTES = 32 << 20
"""What the reader thread may hold in frames read ahead of the model: four frames of
16 features (8 MiB each), fewer for wider rows, never fewer than two. With the segment
watch on, the model takes its frames in bursts (decision points, batches of closed
windows) while it holds the interpreter, and the reader, which needs it for every
frame, falls behind in them; frames read ahead carry the model through."""


def frames_ahead(n_features: int) -> int:
    """Frames the reader may read ahead for rows of ``n_features`` (2 to 4)."""
    return max(2, min(4, READ_AHEAD_BYTES // (BATCH_ROWS * max(n_features, 1) * 8)))


def read_frames(f: BinaryIO, kind: str, settings: Settings, state: ModelState,
                conformer: Conformer, skipped: list[int], stop: threading.Event,
                threaded: bool) -> prefetch:
    """The input's frames, read in a thread a few frames ahead of the model; with a
    model, checked against its range as they are read (:func:`mark_beyond_model`);
    their pass-through columns in the stream's types (``conformer``); the lines of CSV
    rows skipped added to ``skipped``; a set ``stop`` ends the reading."""
    mixture, transforms = state.mixture, state.transforms
    should_stop = stop.is_set
    if transforms is not None and not transforms.identity:
        # the features go to the model's units in the reader thread (before the
        # first model only checked: the warm-up rows stay in the data's units); the
        # model's range, in those units, is checked afterwards (mark_beyond_model)
        frames = transforming.transformed_frames(
            iter_frames(f, kind, settings, should_stop, skipped=skipped), transforms,
            settings.features, check_only=mixture is None)
    else:
        frames = iter_frames(f, kind, settings, should_stop,
                             model_range=None if mixture is None else model_range(mixture),
                             skipped=skipped)
    return prefetch(conformer.frames(frames), depth=frames_ahead(len(settings.features)),
                    threaded=threaded)


def until_claimed(frames: Iterable[Frame], claim: Claim) -> Iterator[Frame]:
    """The frames, until the claim finds the content is not new (decided as soon as
    the digest is known, without waiting for it)."""
    for frame in frames:
        if claim.poll() is not None and claim.seen:
            return
        yield frame


def stop_checked(tables: Iterable, stop: threading.Event) -> Iterator:
    """The items, a stop request checked before each is passed on."""
    for table in tables:
        raise_if_stopped(stop)
        yield table


class TimeColumn:
    """The rows' times (``drift.time_column``) as UTC instants, for the drift watch;
    an epoch unit inferred from the values is said once, when it changes."""

    def __init__(self):
        self.unit_said: str | None = None

    def times(self, settings: Settings, frame: Frame) -> RowTimes | None:
        """The times of the valid rows of ``frame``, or None without the column."""
        drift = settings.drift
        name = drift.time_column
        if name is None or name not in frame.passthrough.column_names:
            return None
        got = row_times(frame.passthrough.column(name), drift.time_unit, drift.time_format)
        if got.inferred_unit is not None and got.inferred_unit != self.unit_said:
            self.unit_said = got.inferred_unit
            log_event("time_unit_inferred", column=name, unit=got.inferred_unit,
                      detail="epoch times as numbers; set drift.time_unit to say which")
        return replace(got, values=got.values[frame.valid])


def frame_labels(frame: Frame, scores, unusual: Unusual, version: int | None) -> pa.Table:
    """The labels table of ``frame`` (``scores`` of its valid rows, None: no model)."""
    observed = frame_observed(frame)
    below = unusual.per_row(observed[frame.valid], frame.features.shape[1])
    return labels_table(frame.passthrough, frame.valid,
                        None if scores is None else scores.segment,
                        None if scores is None else scores.confidence,
                        None if scores is None else scores.log_density,
                        below, version, transforming.valid_log_jacobian(frame),
                        observed=observed)


def scored_tables(frames: Iterable[Frame], mixture: Mixture | None, unusual: Unusual,
                  version: int):
    """Labels tables of ``frames`` scored by a fixed ``mixture`` (None: no model yet)."""
    for frame in frames:
        scores = mixture.score(valid_rows(frame)) if mixture is not None else None
        yield frame_labels(frame, scores, unusual, version)


class InputLearning:
    """One input's frames checked, scored and learned in order by the thread that owns
    the model: :meth:`checked` admits rows and counts them, :meth:`learned` learns
    (or, before the first model, buffers until the warm-up can fit it) and yields each
    frame with its scores once they are known, :meth:`labelled` makes the labels
    tables. Afterwards ``mixture``, ``extra``, the warm-up buffer changes and the row
    counts go to the commit.

    Frames wait (``held``) while there is no model yet, and until the first rows are
    scored, so that labels and the labels file's model version are those of the whole
    input. The unusual-row threshold moves once per scored step (one frame, or the
    frames up to the end of the warm-up), so an input of one frame is labelled as it
    always was; a larger input's later frames are labelled with the threshold that has
    followed its earlier ones.
    """

    def __init__(self, settings: Settings, state: ModelState, extra: dict, version: int,
                 watch: InputWatch | None, life: LifeWatch | None, clock: TimeColumn,
                 stop: threading.Event):
        self.settings = settings
        self.state = state
        self.mixture = state.mixture
        self.extra = extra
        self.version = version
        self.watch, self.life = watch, life
        self.clock = clock
        self.stop = stop
        self.transforms = state.transforms
        self.mapped_here = False       # transforms fixed in this input's warm-up
        self.count = RowCount()
        self.scored = False            # some rows got scores (the labels' model version)
        self.warmup_keep: np.ndarray | None = None
        self.clear_warmup = False
        self.warmup_valid: np.ndarray | None = None   # which rows warmup_keep are
        self.first_unusual = Unusual(-np.inf)   # the thresholds when the first model is made
        self.held: list[Frame] = []
        self.held_scores: list = []     # scores of the held frames once made
        self.warm_up_tried = False
        self.said_waiting = False       # warned that too few rows are complete

    @property
    def labels_version(self) -> int | None:
        """The model version of the labels: None if no row was scored."""
        return self.version if self.scored else None

    def checked(self, frames: Iterable[Frame]) -> Iterator[Frame]:
        """The frames with rows missing features admitted and, with a model, rows
        beyond its range marked invalid; counted."""
        floor = observed_floor(self.settings)
        for frame in frames:
            if self.mapped_here:   # read in the data's units, before the first model
                transforming.map_frames([frame], self.transforms)
            admit_rows(frame, floor, self.mixture)
            if self.mixture is not None:
                mark_beyond_model(frame, self.mixture)
            self.count.add(frame)
            yield frame

    def learned(self, frames: Iterable[Frame]):
        """``(frame, scores, unusual, version)`` of each frame, in order, once its rows
        are scored (``scores`` None: no model by the end of the input)."""
        for frame in frames:
            self.held.append(frame)
            if self.mixture is None:
                self._warm_up()
            else:
                self._learn(frame)
            if self.scored or self.mixture is None:
                yield from self._release()
        if self.mixture is None:
            parts = [valid_rows(f) for f in self.held]
            rows = np.concatenate(parts) if parts else None
            self.warmup_keep = rows if rows is not None and len(rows) else None
            if self.warmup_keep is not None:
                self.warmup_valid = np.concatenate([f.valid for f in self.held])
        self.held_scores += [None] * (len(self.held) - len(self.held_scores))
        yield from self._release(force=True)

    @staticmethod
    def labelled(scored) -> Iterator[pa.Table]:
        """The labels tables of :meth:`learned`'s frames."""
        for frame, scores, unusual, version in scored:
            yield frame_labels(frame, scores, unusual, version)

    def _release(self, force: bool = False):
        """The held frames with their scores, if known (or the input ended)."""
        if not force and (self.mixture is None or not self.scored):
            return
        unusual = Unusual.from_extra(self.extra)
        version = self.labels_version
        for frame, scores in zip(self.held, self.held_scores):
            yield frame, scores, unusual, version
        self.held, self.held_scores = [], []

    def _times(self, frames: list[Frame]) -> None:
        if self.watch is None:
            return
        times = [self.clock.times(self.settings, f) for f in frames]
        if times[0] is None:
            self.watch.times = None
            return
        self.watch.times = np.concatenate([t.values for t in times])
        self.watch.times_unreadable += sum(t.unreadable for t in times)

    def _learn(self, frame: Frame) -> None:
        X = valid_rows(frame)
        self._times([frame])
        self.mixture, scores = learn_chunks(self.settings, self.mixture, X, self.watch,
                                            self.life, self.stop)
        self.held_scores.append(scores)
        self._scored(scores, frame_observed(frame)[frame.valid])

    def _scored(self, scores, observed=None) -> None:
        if scores is None or not len(scores.log_density):
            return
        self.scored = True
        self.extra = after_scoring(self.settings, self.extra, scores, self.mixture, observed)

    def _warm_up(self) -> None:
        """Fit the first model once the buffer and the held frames hold enough rows (one
        try per input, as the rows it is fitted on are the first ``warmup_rows``)."""
        s, st = self.settings, self.state
        D = len(s.features)
        buffered = 0 if st.warmup is None else \
            int(np.count_nonzero(observed_counts(st.warmup) == D))
        complete = buffered + sum(int(np.count_nonzero(frame_observed(f)[f.valid] == D))
                                  for f in self.held)
        if self.warm_up_tried or complete < s.warmup_rows:
            if not self.said_waiting and complete < s.warmup_rows <= \
                    (0 if st.warmup is None else len(st.warmup)) + \
                    sum(f.n_rows - f.n_invalid for f in self.held):
                self.said_waiting = True     # said once per input
                log_event("warmup_waiting_for_complete_rows", logging.WARNING,
                          complete_rows=complete, needed=s.warmup_rows,
                          detail="the first model is fitted on rows with every feature "
                                 "present; rows with missing features wait for it")
            return
        self.warm_up_tried = True
        X = np.concatenate([valid_rows(f) for f in self.held])
        self._times(self.held)
        buffered, fitted = st.warmup, self.transforms
        if fitted is not None and not fitted.identity:
            # the warm-up rows are in the data's units: the transforms (Yeo-Johnson
            # parameters fitted on these rows) are fixed here and kept with the model
            stored = st.warmup if st.warmup is not None else X[:0]
            fitted, buffered, X = transforming.fit_at_warm_up(
                fitted, stored, X, s.warmup_rows)
        mixture, scores, _, init_extra = warm_up(s, X, buffered, self.stop,
                                                 self.watch, self.life)
        if mixture is None:
            return
        if fitted is not self.transforms:
            transforming.map_frames(self.held, fitted)
            self.transforms, self.mapped_here = fitted, True
            for part in (self.watch, self.life):
                if part is not None:
                    part.transforms = fitted
        self.mixture, self.clear_warmup = mixture, True
        self.extra.update(init_extra)
        self.first_unusual = Unusual.from_extra(init_extra)
        start = 0
        for f in self.held:
            n = f.n_rows - f.n_invalid
            self.held_scores.append(rows_of(scores, start, start + n))
            start += n
        self._scored(scores, observed_counts(X))
