"""Is a service running on this state folder, and how is its worker doing?

Two sources, both readable by ``shoal status`` from another process:

- the state folder's lock (``state/lock``): a running ``shoal watch`` or ``ingest``
  holds an exclusive ``flock`` on it and has written its pid into it. The holder is
  found in ``/proc/locks`` (Linux) without touching the lock; elsewhere by trying a
  shared lock for an instant (released at once).
- ``state/liveness.json``, written atomically by the supervisor of ``shoal watch``
  (:class:`LivenessWriter`): its pid and start time, the wall time of the worker's
  last progress, and the last worker failure. It is left behind when the service
  stops or dies, so a later ``status`` can still say what stopped it.
"""
from __future__ import annotations

import errno
import logging
import fcntl
import json
import os
import time
from pathlib import Path
from typing import Any, Callable

from shoal.daemon.runtime.logs import log_event

__all__ = ["LIVENESS_FILE", "lock_holder", "read_liveness", "LivenessWriter", "service_state"]

LIVENESS_FILE = "liveness.json"
_WRITE_EVERY_SECONDS = 5.0


def _pid_in(path: Path) -> int | None:
    try:
        text = path.read_text("ascii", "replace").strip()
    except OSError:
        return None
    return int(text) if text.isdigit() else None


def _proc_locks_holder(path: Path) -> tuple[bool, int | None] | None:
    """(held, pid) from /proc/locks for the lock file's inode; None when unavailable."""
    try:
        st = os.stat(path)
        lines = Path("/proc/locks").read_text().splitlines()
    except OSError:
        return None
    dev = f"{os.major(st.st_dev):02x}:{os.minor(st.st_dev):02x}:{st.st_ino}"
    for line in lines:
        # "1: FLOCK  ADVISORY  WRITE 12345 08:01:131090 0 EOF" (proc(5), /proc/locks)
        parts = line.replace("->", "").split()
        if len(parts) >= 6 and parts[1] == "FLOCK" and parts[5] == dev:
            return True, int(parts[4]) if parts[4].isdigit() else None
    return False, None


def _try_lock_holder(path: Path) -> bool:
    """Whether another process holds the lock: a shared lock tried and released at once."""
    try:
        fd = os.open(path, os.O_RDONLY | os.O_CLOEXEC)
    except OSError:
        return False
    try:
        fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
    except OSError as exc:
        return exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN)
    finally:
        os.close(fd)      # closing the descriptor drops the lock, if it was taken
    return False


def lock_holder(path: Path) -> dict[str, Any]:
    """``{"held": bool, "pid": int | None}`` for the state folder's lock file."""
    path = Path(path)
    if not path.exists():
        return {"held": False, "pid": None}
    found = _proc_locks_holder(path)
    if found is None:
        held = _try_lock_holder(path)
        return {"held": held, "pid": _pid_in(path) if held else None}
    held, pid = found
    return {"held": held, "pid": (_pid_in(path) or pid) if held else None}


def read_liveness(state: Path) -> dict[str, Any] | None:
    """The supervisor's last record, or None when there is none (or it cannot be read)."""
    try:
        data = json.loads((Path(state) / LIVENESS_FILE).read_text("utf-8"))
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) else None


def service_state(state: Path, lock: Path, now: float | None = None) -> dict[str, Any]:
    """What ``status`` says about the service: running or not, pid, last progress, the
    last worker failure (from the liveness record), all as plain data."""
    now = time.time() if now is None else now
    holder = lock_holder(lock)
    record = read_liveness(state) or {}
    same = holder["held"] and record.get("pid") == holder["pid"]
    out: dict[str, Any] = {
        "running": holder["held"],
        "pid": holder["pid"],
        "started": record.get("started") if same else None,
        "last_progress": record.get("last_progress") if same else None,
        "worker_alive": record.get("worker_alive") if same else None,
        "last_failure": record.get("last_failure"),
        "last_run": None if same or not record else {
            "pid": record.get("pid"), "started": record.get("started"),
            "stopped": record.get("stopped"), "last_progress": record.get("last_progress")},
    }
    return out


class LivenessWriter:
    """Keeps ``state/liveness.json`` current from the supervisor's loop.

    ``tick(progress_monotonic, worker_alive)`` rewrites the file at most every few
    seconds (atomically: temp file, ``os.replace``); :meth:`failed` and :meth:`stopped`
    write at once.
    """

    def __init__(self, state: Path, *, wall: Callable[[], float] = time.time,
                 monotonic: Callable[[], float] = time.monotonic):
        self.path = Path(state) / LIVENESS_FILE
        self.wall = wall
        self.monotonic = monotonic
        previous = read_liveness(state) or {}
        self.record: dict[str, Any] = {"pid": os.getpid(), "started": wall(),
                                       "last_progress": None, "worker_alive": None,
                                       "stopped": None,
                                       "last_failure": previous.get("last_failure")}
        self._written = -float("inf")
        self._shape: tuple | None = None

    def tick(self, progress: float | None, worker_alive: bool) -> None:
        if progress is not None:   # the heartbeat's monotonic time as a wall time
            self.record["last_progress"] = self.wall() - (self.monotonic() - progress)
        self.record["worker_alive"] = worker_alive
        shape = (self.record["last_progress"] is None, worker_alive)
        if shape != self._shape or self.monotonic() - self._written >= _WRITE_EVERY_SECONDS:
            self._write()   # at once when the first progress comes or the worker stops

    def failed(self, detail: str) -> None:
        self.record["last_failure"] = {"time": self.wall(), "pid": os.getpid(),
                                       "detail": detail}
        self.record["worker_alive"] = False
        self._write()

    def stopped(self) -> None:
        self.record["stopped"] = self.wall()
        self._write()

    def _write(self) -> None:
        tmp = self.path.with_name(f".{self.path.name}.{os.getpid()}.tmp")
        try:
            tmp.write_text(json.dumps(self.record, sort_keys=True), "utf-8")
            os.replace(tmp, self.path)
        except OSError as exc:
            # A full disk must not stop the service over a status record; the next
            # tick tries again.
            tmp.unlink(missing_ok=True)
            log_event("liveness_write_failed", logging.WARNING, file=str(self.path),
                      detail=str(exc))
            return
        self._written = self.monotonic()
        self._shape = (self.record["last_progress"] is None, self.record["worker_alive"])
