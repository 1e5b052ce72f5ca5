"""The model's contract: the settings that define what a stored model means.

A model learned with features ``[a, b, c]`` holds its means in that order; read with
``[c, b, a]`` it would label rows with the wrong segment and learn them in. So the
store keeps, beside the model, the settings that define it (:func:`model_contract`), and
every command that learns or labels compares the config with them
(:func:`check_model_contract`): a difference is refused (exit 2), naming each key, the
stored value and the configured one.

One change is adopted going forward, logged as a model event (``model_contract_changed``):
``half_life_rows`` from one number to another (the model's memory from the next row on;
what it has learned stays). Before any row is learned or buffered every key may change;
while the warm-up buffer fills, every key but ``features`` (the buffer holds rows in the
stored order). A store made before the contract was kept adopts the config's contract on
its first open, if the config agrees with what the stored model shows (its number of
features, covariance type and schedule).

``status``, ``report`` and ``segments`` never refuse: they show the stored model under its
own feature names and say how the config differs (:func:`contract_differences`).
"""
from __future__ import annotations

import dataclasses
import logging
from typing import Any

from shoal.config import ConfigError, Settings, shown
from shoal.daemon.files.layout import Layout, open_store
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.state.store import StateStore

__all__ = ["model_contract", "contract_differences", "check_model_contract",
           "settings_of_model", "open_model_store", "ADOPTABLE"]

# Keys whose change is taken going forward (see the module docstring).
ADOPTABLE = ("half_life_rows",)


def model_contract(settings: Settings) -> dict[str, Any]:
    """The settings that define the model, by their config keys (JSON-able)."""
    return {
        "features": list(settings.features),
        "covariance": settings.covariance,
        "segments": settings.segments.min if settings.segments.fixed else
        {"min": settings.segments.min, "max": settings.segments.max},   # as the config says
        "half_life_rows": settings.half_life_rows,
        "learning.step_exponent": settings.learning.step_exponent,
        "learning.reg_covar": settings.learning.reg_covar,
        "warmup_rows": settings.warmup_rows,
        "seed": settings.seed,
        "learning.n_init": settings.learning.n_init,
    }


def _diff(stored: dict, configured: dict) -> list[tuple[str, Any, Any]]:
    return [(k, stored.get(k), v) for k, v in configured.items()
            if k in stored and stored[k] != v]


def _facts_of_model(store: StateStore) -> tuple[dict, str] | None:
    """What an older store (no contract kept) shows of its contract: the latest checkpoint's
    covariance and schedule and its number of features (or the warm-up buffer's width)."""
    cp = store.latest_checkpoint()
    if cp is not None:
        schedule = cp.meta.get("schedule") or {}
        facts = {"covariance": cp.meta.get("covariance"),
                 "half_life_rows": schedule.get("half_life_rows"),
                 "learning.step_exponent": schedule.get("alpha")}
        center = cp.arrays.get("center")
        return facts, ("" if center is None else str(int(center.shape[-1])))
    rows = store.warmup_rows()
    return ({}, str(int(rows.shape[1]))) if rows is not None else None


def contract_differences(store: StateStore, settings: Settings) -> list[dict[str, Any]]:
    """Each key where the config differs from the stored contract (for display):
    ``{"key", "stored", "configured"}``; an older store's known facts stand in for it."""
    stored = store.model_contract()
    configured = model_contract(settings)
    if stored is not None:
        return [{"key": k, "stored": a, "configured": b} for k, a, b in _diff(stored, configured)]
    found = _facts_of_model(store)
    if found is None:
        return []
    facts, width = found
    out = [{"key": k, "stored": a, "configured": b} for k, a, b in _diff(facts, configured)]
    if width and int(width) != len(settings.features):
        out.insert(0, {"key": "features", "stored": f"{width} features (names not recorded)",
                       "configured": configured["features"]})
    return out


def _adoptable(key: str, stored: Any, configured: Any, learned: bool, buffered: bool) -> bool:
    if not learned and not buffered:
        return True
    if not learned:
        return key != "features"
    return key in ADOPTABLE and stored is not None and configured is not None


def _first_change(d: dict) -> str:
    """Where two lists of feature names first part, when the lists are too long to show."""
    a, b = d["stored"], d["configured"]
    if not (isinstance(a, list) and isinstance(b, list)) or max(len(a), len(b)) <= 8:
        return ""
    i = next((i for i, (x, y) in enumerate(zip(a, b)) if x != y), min(len(a), len(b)))
    return (f" (first difference at position {i + 1}: stored "
            f"{shown(a[i]) if i < len(a) else 'nothing'}, configured "
            f"{shown(b[i]) if i < len(b) else 'nothing'})")


def _refuse(store: StateStore, refused: list[dict]) -> ConfigError:
    items = "; ".join(f"{d['key']}: stored {shown(d['stored'])}, configured "
                      f"{shown(d['configured'])}{_first_change(d)}" for d in refused)
    return ConfigError(
        f"the config differs from the model stored in {store.path} on what defines that "
        f"model: {items}. Put the stored values back in the config, or give a new state "
        "folder to learn a new model with these settings")


def check_model_contract(store: StateStore, settings: Settings, *, write: bool) -> list[dict]:
    """Compare the config with the stored contract; :class:`ConfigError` (exit 2) naming
    each key that differs and cannot be adopted. With ``write`` (a command that holds the
    state lock), store the contract when there is none and record adopted changes, each
    logged as ``model_contract_changed``. Returns the adopted differences."""
    differences = contract_differences(store, settings)
    learned = store.latest_checkpoint() is not None      # a model was fitted
    buffered = not learned and (store.model_version > 0 or store.warmup_rows() is not None)
    adopted = [d for d in differences
               if _adoptable(d["key"], d["stored"], d["configured"], learned, buffered)]
    refused = [d for d in differences if d not in adopted]
    if refused:
        raise _refuse(store, refused)
    if not write:
        return adopted
    kept = store.model_contract()
    configured = model_contract(settings)
    if kept == configured:
        return adopted
    store.set_model_contract(configured)
    if kept is None:
        log_event("model_contract_recorded", store=str(store.path),
                  model_version=store.model_version, contract=configured)
    for d in adopted:
        log_event("model_contract_changed", logging.WARNING, key=d["key"], stored=d["stored"],
                  configured=d["configured"], model_version=store.model_version)
    return adopted


def settings_of_model(store: StateStore, settings: Settings) -> tuple[Settings, list[dict]]:
    """``settings`` with the stored model's feature names (what its means are in), and how
    the config differs from the stored contract: for showing a model whatever the config."""
    differences = contract_differences(store, settings)
    stored = store.model_contract()
    if stored is not None and stored.get("features") and \
            list(stored["features"]) != list(settings.features):
        settings = dataclasses.replace(settings, features=tuple(stored["features"]))
    elif stored is None and differences and differences[0]["key"] == "features":
        width = int(str(differences[0]["stored"]).split()[0])
        settings = dataclasses.replace(
            settings, features=tuple(f"feature {i + 1}" for i in range(width)))
    return settings, differences


def open_model_store(layout: Layout, settings: Settings, *, write: bool) -> StateStore:
    """The state store, its contract checked against ``settings`` (recorded with ``write``,
    for a command holding the state lock); closed again if refused."""
    store = open_store(layout, checkpoints_kept=settings.learning.checkpoints_kept)
    try:
        check_model_contract(store, settings, write=write)
    except BaseException:
        store.close()
        raise
    return store
