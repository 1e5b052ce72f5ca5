"""What a learned input commits, and the model state it leaves.

Once an input's frames are learned, :func:`learned_model` makes the new model version:
the checkpoint and segment history (the inputs of the warm-up labelled again when this
input made the first model), the drift and lifecycle state, the alerts named. Once its
labels file is named and its digest known, :func:`learned_commit` gathers the commit
(that and the ledger row) and the model state the worker holds after it. What it says
once committed (alerts and events in the log, the alert sender woken) is
:attr:`LearnedInput.announce`.
"""
from __future__ import annotations

import threading
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Callable, Iterable

import numpy as np
import pyarrow as pa

from shoal.config import Settings
from shoal.daemon.files.labels_schema import schema_text
from shoal.daemon.files.layout import Layout
from shoal.daemon.ingest.learning import count_rows, history_rows, raise_if_stopped, with_born
from shoal.daemon.ingest.results import ModelState, Result
from shoal.daemon.ingest.stages import InputLearning
from shoal.daemon.ingest.warmup_labels import label_warmup_inputs
from shoal.daemon.model import transforming
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.segments.segment_names import name_alerts, segment_names
from shoal.daemon.state.store import Checkpoint, InputCommit, LedgerEntry, StateStore, WarmupInput

__all__ = ["LearnedModel", "LearnedInput", "learned_model", "learned_commit"]


@dataclass
class LearnedInput:
    """A learned input ready to commit: its commit, its result, the model state after
    it, and what to say once the commit is durable."""

    commit: InputCommit
    result: Result
    state: ModelState
    announce: Callable[[], None]


@dataclass
class LearnedModel:
    """What an input's learning leaves, before its file is settled: the checkpoint's extra
    data, the checkpoint and segment history of the new model version (None and empty
    without a model), and the alerts named."""

    extra: dict
    checkpoint: Checkpoint | None
    history: list
    alerts: list
    applied: bool        # a pending re-baseline applied by this input


def learned_model(settings: Settings, layout: Layout, store: StateStore, state: ModelState,
                  run: InputLearning, watch, life, rebaseline: tuple[int, str] | None, *,
                  stream_schema: pa.Schema | None,
                  named: Callable[[Iterable[pa.Table]], Iterable[pa.Table]],
                  wall: Callable[[], float], stop: threading.Event) -> LearnedModel:
    """The new model version of the input ``run`` learned from ``state``: the drift
    watch's last windows evaluated, the lifecycle's state taken, the checkpoint and
    history made. Nothing here needs the input's digest or labels file, so the pipeline
    makes it while the writer's thread encodes the last labels (and the digest's thread
    hashes)."""
    version = run.version
    mixture, extra = run.mixture, run.extra
    if mixture is not None and state.mixture is None:
        # the inputs before this one wait with null segments: the first model labels
        # them, and their rows count in the segments' row counts (as in backfill)
        extra = count_rows(extra, label_warmup_inputs(
            state.warmup_inputs, layout.outbox, settings.output.format, mixture,
            run.transforms, run.first_unusual, version, named, stream_schema))
    if mixture is not None:
        extra = with_born(extra, mixture, version, wall)
    if watch is not None and watch.state is not None:
        extra["drift"] = watch.state
    if life is not None and mixture is not None:
        extra["lifecycle"] = life.final_state()
    checkpoint = history = None
    if mixture is not None:
        arrays, meta = mixture.to_state()
        meta = transforming.to_meta(meta, run.transforms)
        checkpoint = Checkpoint(version, arrays, meta, extra)
        history = history_rows(mixture, extra,
                               watch.segment_drift() if watch is not None else None,
                               run.transforms)
        if life is not None:
            history = life.history(history)
    raise_if_stopped(stop)
    alerts = name_alerts((watch.alerts if watch is not None else []) +
                         (life.alerts if life is not None else []),
                         segment_names(store.db))
    return LearnedModel(extra, checkpoint, history or [], alerts,
                        applied=rebaseline is not None and watch.rebaselined)


def learned_commit(learned: LearnedModel, state: ModelState, run: InputLearning,
                   entry: LedgerEntry, digest: str, labels: Path, watch, life,
                   rebaseline: tuple[int, str] | None, *, fixed_schema: pa.Schema | None,
                   listeners: list) -> LearnedInput:
    """The commit of ``learned`` (:func:`learned_model`) for the input ``run`` learned from
    ``state``, its labels in ``labels`` and its content ``digest``; ``fixed_schema`` is
    the stream's pass-through types it fixed (None if fixed before)."""
    version = run.version
    mixture, extra = run.mixture, learned.extra
    warmup_keep, clear_warmup = run.warmup_keep, run.clear_warmup
    count = run.count
    entry = replace(entry, digest=digest, labels=labels.name, rows=count.rows,
                    rows_invalid=count.invalid)
    alerts, applied = learned.alerts, learned.applied
    commit = InputCommit(entry, learned=True, checkpoint=learned.checkpoint,
                         labels_schema=None if fixed_schema is None
                         else schema_text(fixed_schema),
                         warmup_rows=warmup_keep, warmup_valid=run.warmup_valid,
                         clear_warmup=clear_warmup,
                         history=learned.history, alerts=alerts,
                         rebaseline=rebaseline[0] if applied else None)

    def announce() -> None:
        if applied:
            log_event("drift_rebaselined", model_version=version, note=rebaseline[1])
        if watch is not None:
            watch.log_alerts(version)
        if life is not None:
            life.log_events(version)
        if alerts:
            for listener in listeners:
                listener(version)

    result = Result("committed", entry.name, count.rows, count.invalid, labels,
                    model_version=version, rows_outside_domain=count.outside)
    buffered, waiting = None, []
    if mixture is None:
        parts = [a for a in (state.warmup, warmup_keep) if a is not None and len(a)]
        buffered = np.concatenate(parts) if parts else None
        waiting = state.warmup_inputs + ([WarmupInput(labels.name, warmup_keep,
                                                      run.warmup_valid)]
                                         if warmup_keep is not None else [])
    after = ModelState(version, mixture, extra, buffered, run.transforms, waiting)
    return LearnedInput(commit, result, after, announce)
