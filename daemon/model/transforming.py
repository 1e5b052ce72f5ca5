"""The configured per-feature transforms, between the reader and the model.

Rows become float frames in :mod:`shoal.daemon.files.readers`; :func:`transformed_frames`
maps each frame's features into the model's units as it is read (in the reader
thread), marks rows outside a transform's domain invalid (reason
``outside_transform_domain``, counted per frame) and keeps each row's log-Jacobian,
which the labels add to the model's log-density so that ``log_density`` stays a
density in the data's units.

Before the first model, rows are only checked against the domains (and counted) and
stay in the data's units, so that the warm-up buffer does not depend on the
transforms: :func:`fit_at_warm_up` fixes them when the first model is fitted (a
``yeo-johnson`` feature's parameter by maximum likelihood on the warm-up rows) and
maps those rows; :func:`map_frames` maps the frames held for their labels.

The transforms (names and fitted parameters) are part of the model: they are stored
in the checkpoint's metadata (``meta["transforms"]``) and a config that names other
transforms for a stored model is refused (:func:`check_stored`).

Summaries in the data's units: a segment is Gaussian in the transformed units, so for
a monotone transform the back-transformed mean is the segment's median in the data's
units and the back-transformed ``mean +- 1 sd`` its central 68% interval
(:func:`centres`).
"""
from __future__ import annotations

import logging
from typing import Iterable, Iterator

import numpy as np

from shoal.config import Settings
from shoal.core import FeatureTransforms
from shoal.daemon.errors import UsageError
from shoal.daemon.runtime.logs import log_event

__all__ = ["OUTSIDE_DOMAIN", "META_KEY", "configured", "from_meta", "to_meta",
           "check_stored", "transformed_frames", "fit_at_warm_up", "centres",
           "valid_log_jacobian", "feature_centres", "map_frames",
           "moves_in_data_units", "history_units"]

OUTSIDE_DOMAIN = "outside_transform_domain"
META_KEY = "transforms"
# a central interval of +-1 sd of a Gaussian holds 68.27% of it
INTERVAL_SDS = 1.0


def configured(settings: Settings) -> FeatureTransforms:
    """The transforms the config names (Yeo-Johnson parameters not fitted)."""
    return FeatureTransforms.from_kinds(settings.transform_kinds)


def from_meta(meta: dict, n_features: int) -> FeatureTransforms:
    """The transforms a checkpoint's metadata holds (none for a model stored without)."""
    data = meta.get(META_KEY)
    if data is None:
        return FeatureTransforms.from_kinds(("none",) * n_features)
    return FeatureTransforms.from_dict(data)


def to_meta(meta: dict, transforms: FeatureTransforms) -> dict:
    """``meta`` with the transforms added (kept out when every feature is ``none``, so
    that a model without transforms is stored as it always was)."""
    if transforms.identity:
        return meta
    return dict(meta, **{META_KEY: transforms.to_dict()})


def check_stored(stored: FeatureTransforms, settings: Settings) -> None:
    """Refuse a config whose transforms differ from the stored model's (exit code 2)."""
    for name, was, now in zip(settings.features, stored.kinds, settings.transform_kinds):
        if was != now:
            raise UsageError(
                f"transforms.{name}: the stored model was learned with {was!r}, the config "
                f"says {now!r}; a model's transforms cannot change (they are part of the "
                "model): restore the setting, or use a new state folder")


def transformed_frames(frames: Iterable, transforms: FeatureTransforms,
                       names: tuple[str, ...], check_only: bool = False) -> Iterator:
    """``frames`` with their features in the model's units (see the module docstring).

    Each frame gets ``outside_domain`` (rows made invalid here) and ``log_jacobian``
    (shape (n_rows,), 0 for invalid rows). ``model_range`` is cleared: a range checked
    on the raw values means nothing in the transformed units (the pipeline checks it
    again). With ``check_only`` (no model yet) the features stay as they are and no
    log-Jacobian is made.
    """
    if transforms.identity:
        yield from frames
        return
    for frame in frames:
        _transform(frame, transforms, names, check_only)
        yield frame


def _candidates(frame) -> np.ndarray:
    """Rows the transforms apply to: the valid ones, and those invalid only for missing
    values (NaN), which the missing-data rule may still admit (shoal.daemon.files.gaps)."""
    X = frame.features
    with np.errstate(invalid="ignore"):
        gappy = np.isnan(X).any(axis=1) & np.all(np.isnan(X) | np.isfinite(X), axis=1)
    return frame.valid | gappy


def _transform(frame, t: FeatureTransforms, names: tuple[str, ...], check_only: bool) -> None:
    rows = np.flatnonzero(_candidates(frame))
    X = frame.features[rows]
    if check_only:
        inside = t.inside_observed(X)
    else:
        Y, inside, jac_rows = t.forward_observed(X)
        jac = np.zeros(frame.n_rows)
        jac[rows] = jac_rows
        frame.features[rows] = Y
        frame.log_jacobian = jac
    outside = int(np.count_nonzero(~inside))
    if outside:
        bad = rows[~inside]
        frame.valid[bad] = False
        # never admitted as a row with missing values: its reason is the domain
        frame.features[bad] = np.inf
    frame.outside_domain = outside
    frame.model_range = None
    frame.beyond_range = 0
    if outside:
        log_event("rows_invalid", logging.WARNING, reason=OUTSIDE_DOMAIN, rows=outside,
                  features=_outside_features(X[~inside], t, names))


def _outside_features(X: np.ndarray, t: FeatureTransforms, names: tuple[str, ...]) -> dict:
    """How many of the refused rows are outside the domain in each feature."""
    out = {}
    for j, kind in enumerate(t.kinds):
        one = FeatureTransforms((kind,), t.lambdas[j:j + 1])
        n = int(np.count_nonzero(~one.inside_observed(X[:, j:j + 1])))
        if n:
            out[names[j]] = n
    return out


def fit_at_warm_up(transforms: FeatureTransforms, buffered: np.ndarray, X: np.ndarray,
                   warmup_rows: int) -> tuple[FeatureTransforms, np.ndarray, np.ndarray]:
    """Fix the transforms for the first model: fit the ``yeo-johnson`` parameters on the
    first ``warmup_rows`` of the buffered rows and ``X`` (both in the data's units).

    Returns ``(fitted transforms, buffered rows transformed, X transformed)`` (copies).
    Buffered rows outside a domain (buffered under other settings) are left out, with
    a warning. The frames whose valid rows are ``X`` are mapped in place by
    :func:`map_frames` once the warm-up has succeeded.
    """
    inside = transforms.inside_observed(buffered)
    if not inside.all():
        log_event("rows_invalid", logging.WARNING, reason=OUTSIDE_DOMAIN,
                  rows=int(np.count_nonzero(~inside)), where="warm-up buffer")
        buffered = buffered[inside]
    fitted = transforms.fit(np.concatenate([buffered, X])[:warmup_rows])
    return fitted, fitted.forward_observed(buffered)[0], fitted.forward_observed(X)[0]


def map_frames(frames: list, fitted: FeatureTransforms) -> None:
    """Map the valid rows of ``frames`` (read before the first model, checked against
    the domains, still in the data's units) to the model's units, in place, with their
    log-Jacobians."""
    for frame in frames:
        rows = np.flatnonzero(_candidates(frame))
        Y, _, jac = fitted.forward_observed(frame.features[rows])
        frame.log_jacobian = np.zeros(frame.n_rows)
        frame.log_jacobian[rows] = jac
        frame.features[rows] = Y


def valid_log_jacobian(frame) -> np.ndarray | None:
    """The log-Jacobian of a frame's valid rows (None without transforms)."""
    jac = getattr(frame, "log_jacobian", None)
    if jac is None:
        return None
    return jac if frame.n_invalid == 0 else jac[frame.valid]


def centres(transforms: FeatureTransforms, means: np.ndarray, sds: np.ndarray):
    """Segment centres and central 68% intervals in the data's units.

    Parameters
    ----------
    transforms : FeatureTransforms
    means, sds : ndarray of shape (n_components, n_features)
        Per-feature means and sds of each segment in the model's (transformed) units.

    Returns
    -------
    centre, low, high : ndarray of shape (n_components, n_features)
        For a transformed feature the segment's median in the data's units and the
        back-transformed ``mean -+ 1 sd``; for the others the mean and ``mean -+ sd``.
    """
    centre = transforms.inverse(means)
    low = transforms.inverse(means - INTERVAL_SDS * sds)
    high = transforms.inverse(means + INTERVAL_SDS * sds)
    return centre, low, high


def history_units(transforms: FeatureTransforms | None, means, sds):
    """Means and sds (model units, shape (..., n_features)) as the segment history keeps
    them, in the data's units: a transformed feature's median and half its central 68%
    interval."""
    means, sds = np.asarray(means, dtype=np.float64), np.asarray(sds, dtype=np.float64)
    if transforms is None or transforms.identity:
        return means, sds
    one = means.ndim == 1
    centre, low, high = centres(transforms, np.atleast_2d(means), np.atleast_2d(sds))
    half = (high - low) / 2.0
    return (centre[0], half[0]) if one else (centre, half)


def feature_centres(transforms: FeatureTransforms, features, means, sds) -> dict:
    """Per transformed feature of one segment: ``{name: {"median", "interval"}}``.

    ``means`` and ``sds`` have shape (n_features,), in the model's units.
    """
    centre, low, high = centres(transforms, np.asarray(means)[None], np.asarray(sds)[None])
    return {name: {"median": float(centre[0, j]),
                   "interval": [float(low[0, j]), float(high[0, j])]}
            for j, name in enumerate(features) if transforms.kinds[j] != "none"}


def moves_in_data_units(moved: list, transforms: FeatureTransforms | None) -> list:
    """Drift explanations (:func:`shoal.core.drift.explain` records, in the model's
    units) with a transformed feature's baseline and window centre in the data's
    units: the back-transformed means, i.e. medians (``"centre": "median"``); the shift
    stays in the model's (transformed) sds."""
    if transforms is None or transforms.identity:
        return moved
    out = []
    for m in moved:
        j = m["index"]
        kind = transforms.kinds[j]
        if kind == "none":
            out.append(m)
            continue
        two = np.zeros((2, transforms.n_features))
        two[:, j] = (m["baseline_mean"], m["window_mean"])
        back = transforms.inverse(two)[:, j]
        out.append(dict(m, baseline_mean=float(back[0]), window_mean=float(back[1]),
                        centre="median", transform=kind))
    return out
