"""The records the store takes and gives: ledger rows, checkpoints, history rows, the
warm-up inputs and one input's commit.

Plain dataclasses with no behaviour, so that ingest, backfill, the segment watch and
the views can build and read them without touching SQL. The table modules turn them
into rows and back.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Iterable, Mapping

import numpy as np

__all__ = ["LedgerEntry", "Checkpoint", "HistoryRow", "WarmupInput", "InputCommit"]


@dataclass(frozen=True)
class LedgerEntry:
    """One ledger row: an input taken and what became of it (committed, duplicate or
    quarantined), with its content digest, rows, labels file and model version."""
    digest: str | None   # of the input's content, in the store's digest_algorithm
    name: str
    size: int
    outcome: str
    rows: int | None = None
    rows_invalid: int | None = None
    reason: str | None = None
    labels: str | None = None
    model_version: int | None = None
    seen_at: float = 0.0
    finished_at: float = 0.0
    id: int | None = None


@dataclass
class Checkpoint:
    """A model checkpoint: its version, its numpy arrays, and the JSON meta (the model's
    settings) and extra (drift and lifecycle state) stored beside them."""
    version: int
    arrays: dict[str, np.ndarray]
    meta: dict[str, Any]
    extra: dict[str, Any]
    created: float = 0.0


@dataclass(frozen=True)
class HistoryRow:
    """One segment at one model version, as the segment history keeps it: weight, rows,
    mean, spread summary, drift scores and the lifecycle event, if any."""
    segment: int
    weight: float
    rows: int
    mean: list
    spread: list
    drift: Mapping[str, Any] | None = None
    event: str | None = None


@dataclass(frozen=True)
class WarmupInput:
    """An input committed before the first model: its labels file (segments still
    null), its valid rows in the data's units, and which of its rows they are (None for
    an input buffered before the store kept that)."""
    labels: str | None
    rows: np.ndarray
    valid: np.ndarray | None
    learned: bool = True   # False: a duplicate, labelled but not learned from


@dataclass
class InputCommit:
    """Everything one input changes in the store (the arguments of ``commit_input``).

    ``learned``: the input advances the model version by one (a new input); a
    duplicate does not. ``checkpoint.version``, when given, must be the version
    after this input. ``alerts`` go to the outbox (an id already there is kept as
    it was); ``rebaseline`` is a request id applied by this input; ``attempt`` the
    input's attempt key (:meth:`~shoal.daemon.state.store.StateStore.attempts`), cleared by the commit.
    """
    entry: LedgerEntry
    learned: bool
    checkpoint: Checkpoint | None = None
    warmup_rows: np.ndarray | None = None
    warmup_valid: np.ndarray | None = None
    # a duplicate taken before the first model: its valid rows and which rows they are,
    # kept to label it once the model exists (not learned from)
    duplicate_rows: tuple[np.ndarray, np.ndarray] | None = None
    clear_warmup: bool = False
    history: Iterable[HistoryRow] = ()
    alerts: Iterable[tuple[str, Mapping[str, Any]]] = ()
    rebaseline: int | None = None
    attempt: str | None = None
    labels_schema: str | None = None   # the stream's pass-through types, fixed by this input
