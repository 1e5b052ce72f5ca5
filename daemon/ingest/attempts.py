"""Attempts: which inputs a process was working on when it died.

Each input's attempt is recorded in the state store before it is read and cleared
by its commit or quarantine; a clean give-up (a stop, a fault to retry) takes it
back. An input with an attempt left by an earlier process is taken on its own
(:func:`attempt_runs`), and quarantined unread once ``limits.max_attempts``
processes died on it.
"""
from __future__ import annotations

import logging
import sqlite3
from pathlib import Path
from typing import Iterable, Iterator

from shoal.daemon.ingest.claim import attempt_key
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.state.store import StateStore

__all__ = ["Attempts", "attempt_runs"]


class Attempts:
    """The attempts this process recorded in ``store`` (``recorded``) and the key of
    the input in progress (``current``, which its commit or quarantine clears)."""

    def __init__(self, store: StateStore):
        self.store = store
        self.recorded: set[str | None] = set()
        self.current: str | None = None

    def record(self, keys: Iterable[str | None]) -> list[str]:
        """Record the attempts of ``keys`` not recorded yet; returns those recorded."""
        new = [k for k in keys if k is not None and k not in self.recorded]
        self.store.attempts(new, add=1)
        self.recorded.update(new)
        return new

    def give_up(self, keys: list[str]) -> None:
        """Take back the attempts of inputs this process gave up cleanly (a stop, a fault
        to retry, an input not taken after all): only a death leaves one behind."""
        if not keys:
            return
        self.recorded.difference_update(keys)
        try:
            self.store.attempts(keys, add=-1)
        except (OSError, sqlite3.Error) as exc:   # a full disk: counted once more, no more
            log_event("attempts_not_cleared", logging.WARNING, inputs=len(keys),
                      detail=f"{type(exc).__name__}: {exc}")


def attempt_runs(paths: list[Path], store: StateStore, recorded: set[str | None]
                 ) -> Iterator[tuple[dict[Path, str | None], bool]]:
    """``paths`` in order as runs ``({path: attempt key}, suspect)``: an input with an
    attempt of an earlier process (not in ``recorded``) alone (suspect), the others
    together."""
    keys = {p: attempt_key(p) for p in paths}
    prior = store.attempts([k for k in keys.values() if k is not None and k not in recorded])
    run: dict[Path, str | None] = {}
    for path, key in keys.items():
        if key is not None and prior.get(key, 0) > 0:
            if run:
                yield run, False
                run = {}
            yield {path: key}, True
        else:
            run[path] = key
    if run:
        yield run, False
