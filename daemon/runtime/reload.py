"""SIGHUP: read the config again and take what may change while running.

Settings that define the model, the folders, the observer or the listening
socket are fixed for the life of a process; everything else (log level,
watching times and ignore patterns, input limits, labels output, and any
section the service reads afresh for each input, such as alert bounds and
sinks) is reloadable. A new config that fails to load, or that changes a fixed
setting, is refused as a whole: the old settings stay and a log line says why.
"""
from __future__ import annotations

import logging
from pathlib import Path
from typing import Any

from shoal.config import ConfigError, Settings, load_config, settings_to_dict
from shoal.daemon.runtime.logs import LOGGER_NAME, log_event

__all__ = ["FIXED_SETTINGS", "changed_keys", "check_reloadable", "reload_config"]

# Dotted keys (or whole sections) that only a restart may change.
FIXED_SETTINGS = (
    "features", "transforms", "passthrough", "inbox", "outbox", "state", "segments", "covariance",
    "warmup_rows", "half_life_rows", "seed", "learning", "watch.polling", "watch.poll_seconds",
    "watch.recursive",
    "watch.queue_size", "http",
)


def _flatten(data: Any, prefix: str = "") -> dict[str, Any]:
    if isinstance(data, dict):
        out = {}
        for key, value in data.items():
            out.update(_flatten(value, f"{prefix}{key}."))
        return out
    return {prefix.rstrip("."): data}


def changed_keys(old: Settings, new: Settings) -> list[str]:
    """Dotted names of the settings whose values differ."""
    a, b = _flatten(settings_to_dict(old)), _flatten(settings_to_dict(new))
    return sorted(k for k in set(a) | set(b) if a.get(k) != b.get(k))


def _is_fixed(key: str) -> bool:
    return any(key == f or key.startswith(f + ".") for f in FIXED_SETTINGS)


def check_reloadable(old: Settings, new: Settings) -> list[str]:
    """The changed keys; ConfigError naming them when a fixed setting changed."""
    from shoal.daemon.model.contract import ADOPTABLE, model_contract

    changed = changed_keys(old, new)
    fixed = [k for k in changed if _is_fixed(k)]
    defining = [k for k in fixed if (k.split(".")[0] == "segments" or k in model_contract(old))
                and k not in ADOPTABLE]
    if defining:   # a restart would refuse them too (shoal.daemon.model.contract)
        raise ConfigError(f"{', '.join(fixed)}: cannot change while running; "
                          f"{', '.join(defining)} define the stored model: once one is "
                          "learned, a restart with this config is refused too: put the stored values back, or use a "
                          "new state folder for a new model")
    if fixed:
        raise ConfigError(f"{', '.join(fixed)}: cannot change while running; restart shoal "
                          "to use the new value")
    return changed


def reload_config(path: Path, current: Settings) -> tuple[Settings, list[str]] | None:
    """Load ``path`` and check it against ``current``.

    Returns ``(new settings, changed keys)``, or None (logged) when the new config
    is refused; the caller then keeps ``current``.
    """
    try:
        new = load_config(path)
        changed = check_reloadable(current, new)
    except ConfigError as exc:
        log_event("config_reload_refused", logging.ERROR, config=str(path), detail=str(exc),
                  kept="previous settings")
        return None
    if new.log_level != current.log_level:
        logging.getLogger(LOGGER_NAME).setLevel(new.log_level.upper())
    return new, changed
