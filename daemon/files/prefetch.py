"""Read ahead in a thread: an iterator's items produced at most a few steps before they are used.

:class:`prefetch` lets reading and decoding (pyarrow releases the interpreter lock)
overlap with the work on each item, while the consumer's thread alone sees the items
in order; the queue between them is bounded, so memory is too.
"""
from __future__ import annotations

import contextlib
import queue
import threading

__all__ = ["prefetch"]


class prefetch:
    """Iterate ``items`` in a reader thread, at most ``depth`` items ahead of the consumer.

    Reading and decoding (pyarrow, which releases the interpreter lock) then overlap
    with the work done on each item. An error in the reader thread is raised from the
    consumer's next step, after the items before it. Use it as a context manager:
    leaving the block (also early, or on an error) stops the reader and joins it.
    ``threaded=False`` iterates ``items`` in the consumer's thread instead (small inputs:
    starting a thread costs more than it saves).
    """

    def __init__(self, items, depth: int = 2, name: str = "shoal-reader",
                 threaded: bool = True):
        self._items = items
        self._queue: queue.Queue = queue.Queue(maxsize=depth)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name=name, daemon=True) \
            if threaded else None

    @property
    def threaded(self) -> bool:
        return self._thread is not None

    def __enter__(self) -> "prefetch":
        if self._thread is not None:
            self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        if self._thread is None:
            close = getattr(self._items, "close", None)
            if close is not None:
                close()
            return
        self._stop.set()
        while self._thread.is_alive():
            with contextlib.suppress(queue.Empty):   # unblock a waiting put
                self._queue.get(timeout=0.05)
        self._thread.join()

    def __iter__(self):
        if self._thread is None:
            yield from self._items
            return
        while True:
            kind, item = self._queue.get()
            if kind == "end":
                return
            if kind == "error":
                raise item
            yield item

    def _put(self, kind: str, item) -> bool:
        while not self._stop.is_set():
            try:
                self._queue.put((kind, item), timeout=0.05)
                return True
            except queue.Full:
                continue
        return False

    def _run(self) -> None:
        it = iter(self._items)
        try:
            for item in it:
                if not self._put("item", item):
                    return
            self._put("end", None)
        except BaseException as exc:  # handed to the consumer, raised there
            self._put("error", exc)
        finally:
            close = getattr(it, "close", None)
            if close is not None:
                close()
