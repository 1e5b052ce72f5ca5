"""The read-only HTTP endpoint: ``/`` status page, ``/status`` JSON, ``/metrics``,
``/healthz`` and ``/readyz``.

Standard library ``http.server`` on a thread of its own, loopback by default
and off unless ``http.port`` is set. GET and HEAD only: every other method is
answered 405. Connections are bounded (``http.max_connections``: past it a new one closes
the oldest that has not sent a complete request) and one that sends nothing for
``http.idle_seconds`` is closed, so idle or half-open connections cannot use up the
process's file descriptors (which the inputs need too) or its threads. The state is
read through its own read-only connection
(:class:`~shoal.daemon.state.readout.StateReader`), never the worker's. This module
serves; what it serves is read by :mod:`shoal.daemon.state.readout` and drawn by the
views (:mod:`shoal.daemon.views.status_page`, the report's plots, which are drawn once
per model version and kept).
"""
from __future__ import annotations

import contextlib
import json
import logging
import socket
import threading
import time
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any, Callable

from prometheus_client import CONTENT_TYPE_LATEST

from shoal.config import ConfigError, Settings
from shoal.daemon.files.layout import Layout
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.runtime.metrics import build_registry, render_metrics
from shoal.daemon.state.readout import StateReader, state_snapshot

__all__ = ["Health", "StatusServer"]



@dataclass(frozen=True)
class Health:
    """A health or readiness answer: ok or not, and the checks behind it (``/healthz``,
    ``/readyz`` and the status page show it)."""
    ok: bool
    checks: dict[str, Any] = field(default_factory=dict)

    def as_dict(self) -> dict:
        return {"status": "ok" if self.ok else "unhealthy", "checks": self.checks}


class StatusServer:
    """Serves the endpoint until :meth:`stop`.

    ``health``, ``ready`` and ``live`` are callables of the running service
    (:class:`~shoal.daemon.runtime.supervise.Supervisor`); tests pass their own.
    """

    def __init__(self, settings: Settings, layout: Layout, *,
                 health: Callable[[], Health], ready: Callable[[], Health],
                 live: Callable[[], dict] | None = None, wall: Callable[[], float] = time.time):
        self.settings = settings
        self.layout = layout
        self.health = health
        self.ready = ready
        self.live = live or (lambda: {})
        self.wall = wall
        self.lock = threading.Lock()      # one reader connection, one request at a time on it
        self.reader = StateReader(layout.db)
        self.registry = build_registry(self.reader, self.live, self.lock, layout=layout)
        self._plots: tuple[Any, dict[str, bytes]] | None = None
        self._httpd: ThreadingHTTPServer | None = None
        self._thread: threading.Thread | None = None

    # -- lifecycle -------------------------------------------------------------------
    def start(self) -> tuple[str, int]:
        address, port = self.settings.http.address, self.settings.http.port
        handler = _handler_for(self)
        server_class = _V6Server if ":" in address else _BoundedServer
        try:
            httpd = server_class((address, port), handler,
                                 max_connections=self.settings.http.max_connections)
        except OSError as exc:
            raise ConfigError(f"http: cannot listen on {address}:{port}: {exc.strerror}") \
                from exc
        httpd.daemon_threads = True
        self._httpd = httpd
        self._thread = threading.Thread(target=httpd.serve_forever, kwargs={"poll_interval": 0.2},
                                        name="shoal-http", daemon=True)
        self._thread.start()
        host, bound = httpd.server_address[:2]
        log_event("http_started", url=f"http://{_host(host)}:{bound}/", address=host, port=bound)
        return host, bound

    def stop(self, timeout: float = 5.0) -> None:
        if self._httpd is not None:
            self._httpd.shutdown()
            self._httpd.close_connections()
            self._httpd.server_close()
            self._httpd = None
        if self._thread is not None:
            self._thread.join(timeout)
            self._thread = None
        with self.lock:
            self.reader.close()

    # -- content ---------------------------------------------------------------------
    def status(self) -> dict:
        with self.lock:
            snap = state_snapshot(self.reader, self.settings, self.layout, now=self.wall())
        snap["health"] = self.health().as_dict()
        snap["ready"] = self.ready().as_dict()
        snap["live"] = self.live()
        return snap

    def metrics(self) -> bytes:
        return render_metrics(self.registry)

    def page_plots(self, snap: dict) -> dict[str, bytes]:
        """The page's plots, drawn again only when the model or the alerts changed."""
        from shoal.daemon.views.report import render_plots
        from shoal.daemon.views.report_data import report_data
        from shoal.daemon.views.status_page import PAGE_PLOTS

        key = (snap["model_version"], len(snap["recent_alerts"]),
               snap["recent_alerts"][0].get("id") if snap["recent_alerts"] else None)
        cached = self._plots
        if cached is not None and cached[0] == key:
            return cached[1]
        with self.lock:
            data = report_data(self.reader, self.settings, self.layout, now=self.wall())
        pngs = render_plots(data, which=PAGE_PLOTS)
        self._plots = (key, pngs)
        return pngs

    def page(self) -> str:
        """The HTML status page (drawn by :mod:`shoal.daemon.views.status_page`)."""
        from shoal.daemon.views.report_data import feature_units
        from shoal.daemon.views.status_page import status_page_html

        snap = self.status()
        return status_page_html(snap, self.page_plots(snap), feature_units(self.settings))


class _BoundedServer(ThreadingHTTPServer):
    """A thread per connection, at most ``max_connections`` of them: at the bound a new
    connection closes the oldest idle one (no complete request yet), or is itself closed
    when every one is busy answering."""

    request_queue_size = 1024   # the listen backlog: a burst of connects waits in the kernel

    def __init__(self, address, handler, *, max_connections: int):
        super().__init__(address, handler)
        self.max_connections = max_connections
        self._lock = threading.Lock()
        self._open: dict[socket.socket, bool] = {}   # connection -> busy; oldest first

    def process_request(self, request, client_address) -> None:
        with self._lock:
            if len(self._open) >= self.max_connections:
                idle = next((c for c, busy in self._open.items() if not busy), None)
                if idle is None:
                    log_event("http_connection_refused", logging.WARNING,
                              open=len(self._open), detail="every connection is busy")
                    super().shutdown_request(request)
                    return
                del self._open[idle]
                with contextlib.suppress(OSError):   # its thread reads EOF and ends
                    idle.shutdown(socket.SHUT_RDWR)
            self._open[request] = False
        super().process_request(request, client_address)

    def mark_busy(self, request) -> None:
        with self._lock:
            if request in self._open:
                self._open[request] = True

    def shutdown_request(self, request) -> None:
        with self._lock:
            self._open.pop(request, None)
        super().shutdown_request(request)

    def close_connections(self) -> None:
        """At stop: end every connection's thread now rather than at its idle timeout."""
        with self._lock:
            open_, self._open = list(self._open), {}
        for c in open_:
            with contextlib.suppress(OSError):
                c.shutdown(socket.SHUT_RDWR)


class _V6Server(_BoundedServer):
    address_family = socket.AF_INET6


def _host(host: str) -> str:
    return f"[{host}]" if ":" in host else host


def _handler_for(server: StatusServer) -> type[BaseHTTPRequestHandler]:
    class Handler(BaseHTTPRequestHandler):
        server_version = "shoal"
        sys_version = ""
        timeout = server.settings.http.idle_seconds   # on every read and write

        def parse_request(self) -> bool:
            ok = super().parse_request()
            if ok:   # a complete request: no longer idle, not to be closed for another
                self.server.mark_busy(self.request)
            return ok

        def log_message(self, format: str, *args) -> None:  # noqa: A002 - the base's name
            log_event("http_request", logging.DEBUG, request=format % args)

        def _send(self, status: int, body: bytes, content_type: str,
                  extra: dict[str, str] | None = None) -> None:
            self.send_response(status)
            self.send_header("Content-Type", content_type)
            self.send_header("Content-Length", str(len(body)))
            self.send_header("Cache-Control", "no-store")
            self.send_header("X-Content-Type-Options", "nosniff")
            for k, v in (extra or {}).items():
                self.send_header(k, v)
            self.end_headers()
            if self.command != "HEAD":
                self.wfile.write(body)

        def _json(self, status: int, data: Any) -> None:
            self._send(status, (json.dumps(data, indent=2, default=str) + "\n").encode(),
                       "application/json")

        def do_GET(self) -> None:  # noqa: N802 - http.server's name
            path = self.path.split("?", 1)[0]
            try:
                if path == "/healthz":
                    h = server.health()
                    self._json(200 if h.ok else 503, h.as_dict())
                elif path == "/readyz":
                    r = server.ready()
                    self._json(200 if r.ok else 503, r.as_dict())
                elif path == "/metrics":
                    self._send(200, server.metrics(), CONTENT_TYPE_LATEST)
                elif path == "/status":
                    self._json(200, server.status())
                elif path in ("/", "/index.html"):
                    self._send(200, server.page().encode("utf-8"), "text/html; charset=utf-8",
                               {"Content-Security-Policy":
                                "default-src 'none'; img-src data:; style-src 'unsafe-inline'"})
                else:
                    self._json(404, {"error": f"no such page: {path}", "pages": [
                        "/", "/status", "/metrics", "/healthz", "/readyz"]})
            except BrokenPipeError:
                pass  # the client went away
            except Exception as exc:  # a page failed: say so, keep serving  # noqa: BLE001
                log_event("http_error", logging.ERROR, path=path,
                          detail=f"{type(exc).__name__}: {exc}")
                self._json(500, {"error": f"{type(exc).__name__}: {exc}"})

        do_HEAD = do_GET  # noqa: N815

        def _refuse(self) -> None:
            self._send(405, b'{"error": "read-only endpoint: GET and HEAD only"}\n',
                       "application/json", {"Allow": "GET, HEAD"})

        do_POST = do_PUT = do_DELETE = do_PATCH = do_OPTIONS = _refuse  # noqa: N815

        def __getattr__(self, name: str):
            # any other method (TRACE, PROPFIND, a made-up one): 405 too, not http.server's
            # 501 "unsupported method"
            if name.startswith("do_"):
                return self._refuse
            raise AttributeError(name)

        def version_string(self) -> str:
            return self.server_version   # "shoal", without http.server's trailing " "

    return Handler
