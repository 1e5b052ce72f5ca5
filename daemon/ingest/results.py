"""What ingest hands back and keeps between inputs: results and the model's state.

:class:`Result` is what became of one input (committed, duplicate, already done,
quarantined, vanished, refused, changed); :class:`ModelState` is the model the
worker holds between inputs (the mixture, or the warm-up buffer while there is
none, and the checkpoint's extras), loaded from the state store by
:func:`load_model_state` and replaced after each commit.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from shoal.config import Settings
from shoal.core import FeatureTransforms, Mixture, ModelError
from shoal.daemon.errors import StateError
from shoal.daemon.model import transforming
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.state.store import StateStore, WarmupInput

__all__ = ["Result", "ModelState", "load_model_state", "log_result"]


@dataclass
class Result:
    """What became of one input: its outcome (``committed``, ``duplicate``,
    ``already_done``, ``quarantined``, ``vanished``, ``refused``, ``changed``; ``failed``
    in ``shoal ingest``'s report; ``labelled`` for a labels-only run), its rows and rows
    without a segment, the labels file written, the reason and detail of a refusal, and
    the model version after it."""

    outcome: str
    name: str
    rows: int = 0
    rows_invalid: int = 0
    labels: Path | None = None
    reason: str | None = None
    detail: str | None = None
    model_version: int | None = None
    rows_outside_domain: int = 0   # of rows_invalid: outside a transform's domain


@dataclass
class ModelState:
    """The model as the worker holds it between inputs: the version committed last,
    the mixture (None until the warm-up ends) with its checkpoint extras, and until
    then the buffered warm-up rows and the inputs they came from (labelled once the
    first model exists); the transforms are the model's, fixed at warm-up."""

    version: int = 0
    mixture: Mixture | None = None
    extra: dict[str, Any] = field(default_factory=dict)
    warmup: np.ndarray | None = None   # buffered rows while mixture is None
    transforms: FeatureTransforms | None = None   # the model's (fixed at warm-up)
    # the inputs of the warm-up rows, labelled once the first model exists
    warmup_inputs: list[WarmupInput] = field(default_factory=list)


def load_model_state(settings: Settings, store: StateStore) -> ModelState:
    """The model state the store holds (its latest checkpoint, or the warm-up buffer);
    a half-life changed in the config is taken from the next row on. Raises
    :class:`StateError` for a checkpoint that cannot be loaded or does not fit the
    configured features."""
    version = store.model_version
    cp = store.latest_checkpoint()
    if cp is None:
        return ModelState(version=version, warmup=store.warmup_rows(),
                          warmup_inputs=store.warmup_inputs(),
                          transforms=transforming.configured(settings))
    if cp.version != version:
        raise StateError(f"state store's latest checkpoint is version {cp.version} but "
                         f"the model version is {version}")
    meta = cp.meta
    schedule = meta.get("schedule")
    half_life = settings.half_life_rows
    if isinstance(schedule, dict) and None not in (schedule.get("half_life_rows"), half_life) \
            and schedule["half_life_rows"] != half_life:
        # a new half-life is taken from the next row on (shoal.daemon.model.contract)
        meta = {**meta, "schedule": {**schedule, "half_life_rows": half_life}}
    try:
        mixture = Mixture.from_state(cp.arrays, meta)
    except (ModelError, KeyError, TypeError, ValueError, AttributeError) as exc:
        raise StateError(f"checkpoint {cp.version} in {store.path} cannot be loaded "
                         f"({type(exc).__name__}: {exc}); the state is unusable: restore "
                         "the state folder from a backup") from exc
    if mixture.n_features != len(settings.features):
        raise StateError(f"the stored model has {mixture.n_features} features but the "
                         f"config lists {len(settings.features)}; use a new state "
                         "folder for a different feature set")
    transforms = transforming.from_meta(cp.meta, mixture.n_features)
    transforming.check_stored(transforms, settings)
    return ModelState(version=version, mixture=mixture, extra=cp.extra,
                      transforms=transforms)


def log_result(result: Result, duration: float) -> None:
    """The ``input_<outcome>`` log line of a finished input."""
    log_event(f"input_{result.outcome}", logging.INFO, file=result.name, rows=result.rows,
              rows_invalid=result.rows_invalid or None,
              rows_outside_transform_domain=result.rows_outside_domain or None,
              labels=result.labels.name if result.labels else None,
              model_version=result.model_version, duration=round(duration, 4))
