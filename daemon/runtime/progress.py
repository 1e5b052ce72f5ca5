"""Progress bars for long batch commands: tqdm on a terminal, nothing otherwise.

A service or a pipe gets no bar (bars in a log file are noise); the watch loop
logs one line per input instead. ``stream`` is injectable for tests.
"""
from __future__ import annotations

import sys
from typing import Iterable, Iterator, TextIO, TypeVar

__all__ = ["progress", "on_terminal"]

T = TypeVar("T")


def on_terminal(stream: TextIO | None = None) -> bool:
    stream = sys.stderr if stream is None else stream
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):  # closed or not a file
        return False


def progress(items: Iterable[T], *, total: int | None = None, desc: str = "",
             unit: str = "it", stream: TextIO | None = None) -> Iterator[T] | Iterable[T]:
    """``items`` wrapped in a tqdm bar when ``stream`` (stderr) is a terminal; else as is."""
    stream = sys.stderr if stream is None else stream
    if not on_terminal(stream):
        return items
    from tqdm import tqdm

    tqdm.monitor_interval = 0  # no monitor thread: every item updates the bar anyway
    return tqdm(items, total=total, desc=desc, unit=unit, file=stream, leave=False,
                dynamic_ncols=True)
