"""``shoal watch`` as a well-behaved service: worker thread, health, systemd, HTTP, SIGHUP.

The worker thread runs :meth:`Service.run` and owns the model. The main
thread supervises: it tells the service manager ``READY=1`` once the worker's
loop is turning (state loaded, observer started), sends ``WATCHDOG=1`` only
while the worker is alive and making progress, keeps ``STATUS=`` current,
applies a SIGHUP reload between inputs, logs progress now and then, and on
SIGTERM sends ``STOPPING=1`` and waits for the worker.

The supervisor also keeps ``state/liveness.json`` (:mod:`shoal.daemon.runtime.liveness`): its
pid, the wall time of the last progress and the last worker failure, for ``shoal
status`` run from another process; and it applies the retention settings between
inputs (:class:`~shoal.daemon.state.retention.RetentionKeeper`, on the worker).

Progress is a heartbeat stamped every time the worker asks whether it should
stop: once per turn of its loop, per record batch read and per chunk learned
(:class:`BeatingEvent` stands in for the pipeline's stop event).
"""
from __future__ import annotations

import logging
import os
import signal
import threading
import time
from pathlib import Path
from typing import Callable

from shoal.config import Settings
from shoal.daemon.files.layout import Layout
from shoal.daemon.runtime.liveness import LivenessWriter
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.runtime.notify import Notifier
from shoal.daemon.ingest.pipeline import Pipeline, Result
from shoal.daemon.runtime.reload import reload_config
from shoal.daemon.state.retention import RetentionKeeper
from shoal.daemon.intake.service import Service
from shoal.daemon.runtime.status_http import Health, StatusServer

__all__ = ["Heartbeat", "BeatingEvent", "Supervisor"]

_PROGRESS_LOG_SECONDS = 60.0


class Heartbeat:
    """The monotonic time of the worker's last sign of progress."""

    def __init__(self, clock: Callable[[], float] = time.monotonic):
        self.clock = clock
        self.last: float | None = None

    def beat(self) -> None:
        self.last = self.clock()

    def age(self) -> float | None:
        return None if self.last is None else self.clock() - self.last


class BeatingEvent(threading.Event):
    """A stop event whose every ``is_set()`` check on ``thread`` (the worker) is a heartbeat.

    Checks from other threads (the supervisor, a signal handler) are not progress.
    """

    def __init__(self, heartbeat: Heartbeat, thread: threading.Thread | None = None):
        super().__init__()
        self.heartbeat = heartbeat
        self.thread = thread

    def is_set(self) -> bool:
        if self.thread is None or threading.current_thread() is self.thread:
            self.heartbeat.beat()
        return super().is_set()


class Supervisor:
    """Runs ``shoal watch``: the worker thread that owns the model, and on the main thread
    the service manager's notifications, health, the HTTP endpoint, reloads, retention
    and an orderly stop."""

    def __init__(self, settings: Settings, layout: Layout, pipeline: Pipeline, *,
                 config_path: Path | None = None, notifier: Notifier | None = None,
                 observer_factory: Callable[[], object] | None = None,
                 on_result: Callable[[Result], None] | None = None,
                 clock: Callable[[], float] = time.monotonic):
        self.settings = settings
        self.layout = layout
        self.pipeline = pipeline
        self.config_path = config_path
        self.notifier = notifier or Notifier()
        self.clock = clock
        self.heartbeat = Heartbeat(clock)
        self.liveness = LivenessWriter(layout.state, monotonic=clock)
        if pipeline.stop.is_set():
            raise RuntimeError("the pipeline's stop event is already set")
        self.worker = threading.Thread(target=self._work, name="shoal-worker")
        pipeline.stop = BeatingEvent(self.heartbeat, self.worker)
        self.retention = RetentionKeeper(pipeline, clock=clock)

        def each_result(result: Result) -> None:
            if on_result is not None:
                on_result(result)
            self.retention.between_inputs()

        self.service = Service(settings, layout, pipeline, observer_factory=observer_factory,
                               clock=clock, on_result=each_result)
        self.stop_event = pipeline.stop
        self.wake = threading.Event()
        self.worker_error: BaseException | None = None
        self.http: StatusServer | None = None
        self.http_address: tuple[str, int] | None = None
        self._reload_requested = False

    # -- the worker ------------------------------------------------------------------
    def _work(self) -> None:
        try:
            self.service.run()
        except BaseException as exc:  # kept and re-raised by run() in the main thread
            self.worker_error = exc
            detail = f"{type(exc).__name__}: {exc}"
            log_event("worker_failed", logging.ERROR, detail=detail)
            self.liveness.failed(detail)
        finally:
            self.wake.set()

    # -- health ----------------------------------------------------------------------
    def health(self) -> Health:
        """Healthy: the worker thread is alive and made progress within watch.stall_seconds."""
        alive = self.worker.is_alive()
        age = self.heartbeat.age()
        stall = self.settings.watch.stall_seconds
        recent = age is not None and age <= stall
        return Health(alive and recent, {
            "worker_alive": alive,
            "progress_age_seconds": None if age is None else round(age, 3),
            "stall_seconds": stall,
        })

    def readiness(self) -> Health:
        """Ready: state loaded (the worker loop runs), observer alive, outputs writable."""
        loaded = self.heartbeat.last is not None and self.worker.is_alive()
        observer = self.service.watcher.alive()
        writable = {name: os.access(path, os.W_OK) for name, path in
                    (("outbox", self.layout.outbox), ("state", self.layout.state))}
        checks = {"state_loaded": loaded, "observer_alive": observer,
                  **{f"{k}_writable": v for k, v in writable.items()},
                  "model_version": self.pipeline.state.version}
        return Health(loaded and observer and all(writable.values()), checks)

    def live(self) -> dict:
        s = self.service
        depth = s.queued() + s.watcher.events.qsize()
        age = self.heartbeat.age()
        counts = dict(s.counts)
        return {"queue_depth": depth, "worker_healthy": self.health().ok,
                "heartbeat_age_seconds": age if age is not None else float("nan"),
                "not_read": {k: counts.get(k, 0) for k in ("refused", "vanished")},
                "rows_skipped": self.pipeline.rows_skipped}

    def status_line(self) -> str:
        st = self.pipeline.state
        if st.mixture is None:
            buffered = 0 if st.warmup is None else len(st.warmup)
            phase = f"warming up ({buffered} of {self.settings.warmup_rows} rows)"
        else:
            phase = f"model version {st.version}, {st.mixture.n_components} segments"
        done = self.service.counts.get("committed", 0)
        return f"{phase}; {done} inputs committed since start; queue {self.live()['queue_depth']}"

    # -- control ---------------------------------------------------------------------
    def request_stop(self) -> None:
        self.service.request_stop()
        self.wake.set()

    def request_reload(self) -> None:
        self._reload_requested = True
        self.wake.set()

    def start(self) -> None:
        """Start the HTTP endpoint (when configured) and the worker."""
        if self.settings.http.port is not None:
            self.http = StatusServer(self.settings, self.layout, health=self.health,
                                     ready=self.readiness, live=self.live)
            self.http_address = self.http.start()
        self.worker.start()

    def shutdown(self, timeout: float | None = None) -> None:
        """Stop the worker and the endpoint; wait for both."""
        self.request_stop()
        self.worker.join(timeout)
        if self.http is not None:
            self.http.stop()
            self.http = None

    def _reload(self) -> None:
        self._reload_requested = False
        if self.config_path is None:
            log_event("config_reload_refused", logging.ERROR, detail="no config file to read")
            return
        self.notifier.reloading()
        got = reload_config(self.config_path, self.settings)
        if got is not None:
            new, changed = got
            self.settings = new
            self.service.replace_settings(new, applied=lambda s: self._applied(s, changed))
        self.notifier.ready(self.status_line())

    def _applied(self, settings: Settings, changed: list[str]) -> None:
        """On the worker, once the new settings are in use: tell whoever holds settings of
        their own (``pipeline.settings_listeners``, e.g. the alert sinks), then log."""
        for listener in list(getattr(self.pipeline, "settings_listeners", ())):
            try:
                listener(settings)
            except Exception as exc:  # noqa: BLE001 - one listener must not stop the reload
                log_event("config_reload_listener_failed", logging.ERROR,
                          listener=getattr(listener, "__qualname__", repr(listener)),
                          detail=f"{type(exc).__name__}: {exc}")
        log_event("config_reloaded", config=str(self.config_path), changed=changed)

    def run(self) -> int:
        """Supervise until the worker stops; call from the main thread. 0 on a clean stop."""
        old_hup = None
        if threading.current_thread() is threading.main_thread():
            old_hup = signal.signal(signal.SIGHUP, lambda *_: self.request_reload())
        interval = self.notifier.watchdog_seconds
        tick = min(1.0, interval / 2) if interval else 1.0
        ready_sent, last_status, next_ping, next_log = False, None, 0.0, 0.0
        try:
            self.start()
            self.liveness.tick(self.heartbeat.last, self.worker.is_alive())
            while self.worker.is_alive() and not self.stop_event.is_set():
                self.wake.wait(tick)
                self.wake.clear()
                if self.stop_event.is_set() or not self.worker.is_alive():
                    break
                now = self.clock()
                self.liveness.tick(self.heartbeat.last, self.worker.is_alive())
                if not ready_sent and self.heartbeat.last is not None:
                    ready_sent = True
                    self.notifier.ready(self.status_line())
                    log_event("service_ready", systemd=self.notifier.enabled,
                              url=None if self.http_address is None else
                              f"http://{self.http_address[0]}:{self.http_address[1]}/")
                if self._reload_requested:
                    self._reload()
                if interval and now >= next_ping and self.health().ok:
                    self.notifier.watchdog()
                    next_ping = now + interval / 2
                line = self.status_line()
                if line != last_status and ready_sent:
                    self.notifier.status(line)
                    last_status = line
                if now >= next_log:
                    if next_log:
                        log_event("progress", status=line, healthy=self.health().ok)
                    next_log = now + _PROGRESS_LOG_SECONDS
        finally:
            self.notifier.stopping("stopping")
            self.shutdown()
            self.liveness.stopped()
            self.notifier.close()
            if old_hup is not None:
                signal.signal(signal.SIGHUP, old_hup)
        if self.worker_error is not None:
            raise self.worker_error
        return 0
