"""Watch the inbox: file events onto a bounded queue, plus full listings.

The event handler does nothing but put ``(path, renamed)`` on the queue; if
the queue is full the event is dropped and ``overflowed`` is set, so that the
worker rescans. The worker owns everything else. If the observer thread dies
it is rebuilt by :meth:`InboxWatcher.ensure_alive`, which the worker calls on
every turn of its loop.
"""
from __future__ import annotations

import os
import queue
import threading
from pathlib import Path
from typing import Callable

from watchdog.events import (
    DirCreatedEvent,
    DirModifiedEvent,
    FileClosedEvent,
    FileCreatedEvent,
    FileModifiedEvent,
    FileMovedEvent,
    FileSystemEvent,
    FileSystemEventHandler,
)
from watchdog.observers import Observer
from watchdog.observers.polling import PollingObserver

__all__ = ["EnqueueHandler", "InboxWatcher", "scan_inbox", "EVENTS"]

# The events the handler acts on. The observer asks the OS for these only: not for
# the opens, reads, closes after reading and deletions that the worker itself makes
# for every input, each of which would otherwise wake the observer's threads (and
# take the interpreter lock from the worker) for an event that is thrown away.
EVENTS = [FileMovedEvent, FileCreatedEvent, FileModifiedEvent, FileClosedEvent,
          DirCreatedEvent]


class EnqueueHandler(FileSystemEventHandler):
    """Puts paths of interest on ``events``; never blocks, never does real work."""

    def __init__(self, inbox: Path, events: "queue.Queue[tuple[str, bool]]",
                 recursive: bool = False):
        self.inbox = os.path.normpath(str(inbox))
        self.events = events
        self.recursive = recursive
        self.overflowed = threading.Event()

    def _put(self, path: str, renamed: bool) -> None:
        folder = os.path.dirname(os.path.normpath(path))
        if folder != self.inbox and not (
                self.recursive and folder.startswith(self.inbox + os.sep)):
            return  # only entries in the inbox (or, recursive, in its sub-folders)
        try:
            self.events.put_nowait((path, renamed))
        except queue.Full:
            self.overflowed.set()

    def on_any_event(self, event: FileSystemEvent) -> None:
        if isinstance(event, FileMovedEvent):
            self._put(os.fsdecode(event.dest_path), True)
        elif isinstance(event, (FileCreatedEvent, FileModifiedEvent, FileClosedEvent,
                                DirCreatedEvent)):
            self._put(os.fsdecode(event.src_path), False)
        elif isinstance(event, DirModifiedEvent):
            pass  # the inbox itself changed; the file events say how


def _event_observer():
    """The platform's event observer; on Linux one that reports a file moved in from
    outside the inbox as a move (not as a creation), so it is read at once."""
    try:
        from watchdog.observers.inotify import InotifyObserver
    except ImportError:  # not Linux
        return Observer()
    return InotifyObserver(generate_full_events=True)


def scan_inbox(inbox: Path, recursive: bool = False,
               ignored: Callable[[str], bool] = lambda name: False) -> list[str]:
    """Every entry directly in the inbox, links not followed; ``recursive``: the entries
    of its sub-folders too (not the folders themselves, nor those ``ignored`` by name)."""
    if not recursive:
        with os.scandir(inbox) as it:
            return sorted(os.path.join(inbox, e.name) for e in it)
    out = []
    for folder, dirs, files in os.walk(inbox, followlinks=False):
        dirs[:] = [d for d in dirs if not ignored(d)]
        out += [os.path.join(folder, f) for f in files]
        # links to folders are entries too (the gate refuses them, as at the top level)
        out += [os.path.join(folder, d) for d in dirs if os.path.islink(os.path.join(folder, d))]
    return sorted(out)


class InboxWatcher:
    """Owns the observer thread and the bounded event queue.

    ``observer_factory`` makes an unstarted observer (watchdog's ``Observer``,
    ``PollingObserver``, or a test double); it is injectable.
    """

    def __init__(self, inbox: Path, queue_size: int = 10000, polling: bool = False,
                 poll_seconds: float = 1.0,
                 observer_factory: Callable[[], object] | None = None,
                 recursive: bool = False):
        self.inbox = Path(inbox)
        self.recursive = recursive
        self.events: queue.Queue[tuple[str, bool]] = queue.Queue(maxsize=queue_size)
        self.handler = EnqueueHandler(self.inbox, self.events, recursive)
        if observer_factory is None:
            if polling:
                observer_factory = lambda: PollingObserver(timeout=poll_seconds)  # noqa: E731
            else:
                observer_factory = _event_observer
        self._factory = observer_factory
        self._observer = None
        self.rebuilds = 0

    def start(self) -> None:
        observer = self._factory()
        observer.daemon = True
        observer.schedule(self.handler, str(self.inbox), recursive=self.recursive,
                          event_filter=EVENTS)
        observer.start()
        self._observer = observer

    def alive(self) -> bool:
        return self._observer is not None and self._observer.is_alive()

    def ensure_alive(self) -> bool:
        """Rebuild the observer if its thread died; True when it was rebuilt."""
        if self.alive():
            return False
        self.stop()
        self.start()
        self.rebuilds += 1
        return True

    def stop(self, timeout: float = 5.0) -> None:
        observer, self._observer = self._observer, None
        if observer is None:
            return
        try:
            observer.stop()
            observer.join(timeout)
        except RuntimeError:
            pass  # never started: nothing to join

    def take_overflow(self) -> bool:
        """True once after the queue overflowed (a rescan is then due)."""
        if self.handler.overflowed.is_set():
            self.handler.overflowed.clear()
            return True
        return False
