"""Tell the service manager how the daemon is doing (systemd's notify protocol).

The protocol is one datagram of ``KEY=VALUE`` lines to the ``AF_UNIX`` socket
named by ``$NOTIFY_SOCKET`` (sd_notify(3), NOTES: a name starting with ``@`` is
a Linux abstract-namespace socket). The watchdog interval comes from
``$WATCHDOG_USEC``; ``$WATCHDOG_PID``, when set, names the process it is meant
for. Standard library only. Without ``$NOTIFY_SOCKET`` every call is a no-op.
"""
from __future__ import annotations

import logging
import os
import socket
import time
from typing import Mapping

from shoal.daemon.runtime.logs import log_event

__all__ = ["Notifier", "watchdog_interval"]


def watchdog_interval(env: Mapping[str, str] | None = None,
                      pid: int | None = None) -> float | None:
    """Seconds between the manager's watchdog deadlines, or None when there is none."""
    env = os.environ if env is None else env
    usec = env.get("WATCHDOG_USEC", "")
    if not usec.isdigit() or int(usec) == 0:
        return None
    target = env.get("WATCHDOG_PID", "")
    if target and target != str(os.getpid() if pid is None else pid):
        return None  # the watchdog is meant for another process
    return int(usec) / 1e6


def _address(name: str) -> str | bytes:
    if name.startswith("@"):
        return b"\0" + name[1:].encode()   # abstract namespace
    return name


class Notifier:
    """Sends notify messages; failures are logged once, never raised.

    ``env`` is injectable (tests pass their own ``NOTIFY_SOCKET``).
    """

    def __init__(self, env: Mapping[str, str] | None = None):
        env = os.environ if env is None else env
        self.socket_name = env.get("NOTIFY_SOCKET") or None
        self.watchdog_seconds = watchdog_interval(env)
        self._sock: socket.socket | None = None
        self._failed = False
        if self.socket_name and not self.socket_name.startswith(("/", "@")):
            log_event("notify_unsupported", logging.WARNING, socket=self.socket_name,
                      detail="only filesystem paths and @abstract names are supported")
            self.socket_name = None

    @property
    def enabled(self) -> bool:
        return self.socket_name is not None

    def send(self, **fields: object) -> bool:
        """Send one datagram, e.g. ``send(READY=1, STATUS="...")``; True when sent."""
        if self.socket_name is None:
            return False
        lines = []
        for key, value in fields.items():
            text = str(value).replace("\n", " ")
            lines.append(f"{key}={text}")
        payload = "\n".join(lines).encode("utf-8", "replace")
        try:
            if self._sock is None:
                self._sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC)
            self._sock.sendto(payload, _address(self.socket_name))
        except OSError as exc:
            if not self._failed:  # once: a missing manager must not flood the log
                log_event("notify_failed", logging.WARNING, socket=self.socket_name,
                          detail=str(exc))
            self._failed = True
            return False
        self._failed = False
        return True

    def ready(self, status: str | None = None) -> bool:
        return self.send(READY=1, **({"STATUS": status} if status else {}))

    def status(self, status: str) -> bool:
        return self.send(STATUS=status)

    def watchdog(self) -> bool:
        return self.send(WATCHDOG=1)

    def reloading(self) -> bool:
        # MONOTONIC_USEC lets Type=notify-reload managers match the reload to its request.
        return self.send(RELOADING=1, MONOTONIC_USEC=int(time.clock_gettime(
            time.CLOCK_MONOTONIC) * 1e6))

    def stopping(self, status: str | None = None) -> bool:
        return self.send(STOPPING=1, **({"STATUS": status} if status else {}))

    def close(self) -> None:
        if self._sock is not None:
            self._sock.close()
            self._sock = None
