"""The labels of the inputs taken before the first model, written again by it.

Inputs that arrive while the model is warming up are labelled without segments
and their valid rows kept in the state store (:class:`WarmupInput`). The input
that completes the warm-up makes the first model; before its commit, each waiting
labels file is replaced atomically by one scored by that model. A crash before
the commit makes the same model from the same rows again, and the same files.
"""
from __future__ import annotations

import logging
from pathlib import Path
from typing import Callable, Iterable

import numpy as np
import pyarrow as pa

from shoal.core import FeatureTransforms, Mixture
from shoal.daemon.files.gaps import Unusual, observed_counts
from shoal.daemon.files.writer import LabelsFile, relabelled_table
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.state.store import WarmupInput

__all__ = ["label_warmup_inputs"]


def label_warmup_inputs(waiting_inputs: list[WarmupInput], outbox: Path, fmt: str,
                        mixture: Mixture, transforms: FeatureTransforms | None,
                        unusual: Unusual, version: int,
                        named: Callable[[Iterable[pa.Table]], Iterable[pa.Table]],
                        passthrough: pa.Schema | None) -> list[np.ndarray]:
    """Write the labels of ``waiting_inputs`` again, scored by the first model
    (``version``: its version), each file replaced atomically; ``named`` adds segment
    names where configured, ``passthrough`` is the stream's pass-through schema.
    Returns the segments given to the rows of learned inputs (a duplicate's rows are
    labelled, not counted)."""
    given = []
    for waiting in waiting_inputs:
        if waiting.labels is None:
            continue
        path = outbox / waiting.labels
        X, valid = waiting.rows, waiting.valid
        jacobian = None
        if transforms is not None and not transforms.identity:
            inside = transforms.inside(X)
            jacobian = transforms.log_jacobian(X[inside])
            X = transforms.forward(X[inside])[0]
            if valid is not None and not inside.all():
                valid = valid.copy()
                valid[np.flatnonzero(valid)[~inside]] = False
        scores = mixture.score(X)
        below = unusual.per_row(observed_counts(X), X.shape[1])
        if waiting.learned:   # a duplicate's rows are labelled, not counted
            given.append(scores.segment)
        try:
            table, meta = relabelled_table(path, fmt, valid, scores, below, version,
                                           jacobian, passthrough)
            with LabelsFile(path, fmt, threaded=False) as out:   # replaced atomically
                out.write_all(named([table]))
                out.keep(meta)
        except FileNotFoundError:
            log_event("warmup_labels_missing", logging.WARNING, labels=waiting.labels)
        except ValueError as exc:
            log_event("warmup_labels_not_rewritten", logging.WARNING,
                      labels=waiting.labels, detail=str(exc))
    if waiting_inputs:
        log_event("warmup_inputs_labelled", inputs=len(waiting_inputs),
                  rows=sum(len(w.rows) for w in waiting_inputs), model_version=version)
    return given
