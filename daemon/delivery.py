"""Alert delivery after commit: the JSON-lines file and signed webhooks, at least once.

Alerts reach the outbox table in the same transaction as the model version that
raised them; :class:`AlertSender` takes them from there, oldest first and in order
for each sink (one waiting for its retry holds back the later ones), and marks
each sink's delivery in the state store, so a restart delivers whatever was left
undelivered (a notification may then arrive twice; its id and the
``Idempotency-Key`` header let the receiver drop the repeat).

Sinks:

* the JSON-lines file (``alerts.file``): one JSON object per line, appended and
  fsynced;
* each webhook (``alerts.webhooks``): an HTTP POST of the same JSON, with
  ``X-Shoal-Signature: sha256=<hex HMAC-SHA256 of the body under the secret>``
  and ``Idempotency-Key: <notification id>``. Only 2xx counts as delivered;
  redirects are not followed (a 3xx is a failure). A failure is retried after
  ``backoff_seconds * 2^(attempt-1)`` (capped at ``max_backoff_seconds``) times a
  random factor in [0.5, 1.5); after ``retries`` retries the notification waits
  for the next start of the service. A webhook whose host is not in
  ``alerts.allow_hosts`` is refused with an error log line and never contacted.
"""
from __future__ import annotations

import hashlib
import hmac
import http.client
import logging
import os
import random
import ssl
import threading
import time
import urllib.parse
from importlib import metadata
from pathlib import Path

from shoal.config import ConfigError, Settings, read_secret_file
from shoal.config.settings import WebhookSettings
from shoal.daemon.logs import log_event
from shoal.daemon.store import StateStore

__all__ = ["AlertSender", "sign", "SIGNATURE_HEADER", "IDEMPOTENCY_HEADER", "alert_body"]

SIGNATURE_HEADER = "X-Shoal-Signature"
IDEMPOTENCY_HEADER = "Idempotency-Key"
_RESPONSE_LIMIT = 65536


def alert_body(payload_text: str) -> bytes:
    """The bytes sent and signed: the payload as stored (sorted keys), UTF-8."""
    return payload_text.encode("utf-8")


def sign(secret: bytes, body: bytes) -> str:
    """``sha256=<hex>``: HMAC-SHA256 of ``body`` under ``secret``."""
    return "sha256=" + hmac.new(secret, body, hashlib.sha256).hexdigest()


def _user_agent() -> str:
    try:
        return f"shoal/{metadata.version('shoal')}"
    except metadata.PackageNotFoundError:
        return "shoal"


class DeliveryFailed(Exception):
    pass


class _FileSink:
    name = "file"

    def __init__(self, path: Path):
        self.path = Path(path)

    def send(self, outbox_id: str, payload_text: str) -> None:
        line = payload_text.replace("\n", " ") + "\n"
        try:
            fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT | os.O_CLOEXEC, 0o640)
            try:
                os.write(fd, line.encode("utf-8"))
                os.fsync(fd)
            finally:
                os.close(fd)
        except OSError as exc:
            raise DeliveryFailed(f"cannot append to {self.path}: {exc.strerror}") from exc


class _WebhookSink:
    def __init__(self, hook: WebhookSettings, secret: bytes):
        self.hook = hook
        self.secret = secret
        self.url = urllib.parse.urlsplit(hook.url)
        shown = f"{self.url.scheme}://{self.url.hostname}"
        if self.url.port:
            shown += f":{self.url.port}"
        shown += self.url.path or "/"
        self.shown = shown                      # no query string or user info in logs
        self.name = "webhook:" + shown + "#" + hashlib.sha256(hook.url.encode()).hexdigest()[:8]

    def send(self, outbox_id: str, payload_text: str) -> None:
        body = alert_body(payload_text)
        u = self.url
        timeout = self.hook.timeout_seconds
        if u.scheme == "https":
            conn = http.client.HTTPSConnection(u.hostname, u.port, timeout=timeout,
                                               context=ssl.create_default_context())
        else:
            conn = http.client.HTTPConnection(u.hostname, u.port, timeout=timeout)
        path = (u.path or "/") + (f"?{u.query}" if u.query else "")
        headers = {"Content-Type": "application/json", "User-Agent": _user_agent(),
                   SIGNATURE_HEADER: sign(self.secret, body), IDEMPOTENCY_HEADER: outbox_id}
        try:
            conn.request("POST", path, body=body, headers=headers)
            resp = conn.getresponse()
            resp.read(_RESPONSE_LIMIT)
        except (OSError, http.client.HTTPException) as exc:
            raise DeliveryFailed(f"POST {self.shown} failed: {type(exc).__name__}: {exc}") \
                from exc
        finally:
            conn.close()
        if 300 <= resp.status < 400:
            raise DeliveryFailed(f"POST {self.shown} answered {resp.status} (redirect to "
                                 f"{resp.getheader('Location')!r} not followed)")
        if not 200 <= resp.status < 300:
            raise DeliveryFailed(f"POST {self.shown} answered {resp.status} {resp.reason}")


def _read_secret(hook: WebhookSettings) -> bytes | None:
    if hook.secret_file is not None:
        try:   # a bounded regular file, opened without blocking (not /dev/zero, a FIFO)
            return read_secret_file(hook.secret_file)
        except (OSError, ConfigError) as exc:
            log_event("webhook_secret_unreadable", logging.ERROR, file=str(hook.secret_file),
                      detail=exc.strerror if isinstance(exc, OSError) else str(exc))
            return None
    value = os.environ.get(hook.secret_env or "")
    if not value:
        log_event("webhook_secret_missing", logging.ERROR, variable=hook.secret_env,
                  detail="the environment variable is not set; alerts are not sent to "
                         "this webhook")
        return None
    return value.encode("utf-8")


class AlertSender:
    """Deliver the outbox to the sinks, on a thread (``start``/``wake``/``stop``) or in
    passes (:meth:`deliver_due`). Opens its own connection to the state store."""

    def __init__(self, settings: Settings, db: Path, *, clock=time.time,
                 rng: random.Random | None = None, webhooks: bool = True):
        self.clock = clock
        self.rng = rng or random.Random()
        self.store = StateStore(db, clock=clock)
        self.webhooks = webhooks
        self._pending_settings: Settings | None = None
        self._build_sinks(settings)
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.store.retry_undelivered_now()

    def _build_sinks(self, settings: Settings) -> None:
        self.settings = settings
        self.sinks: list = [_FileSink(settings.alerts.file)]
        self.hooks: dict[str, WebhookSettings] = {}
        allowed = {h.lower() for h in settings.alerts.allow_hosts}
        for hook in settings.alerts.webhooks if self.webhooks else ():
            host = (urllib.parse.urlsplit(hook.url).hostname or "").lower()
            if host not in allowed:
                log_event("webhook_refused", logging.ERROR, host=host,
                          detail=f"webhook host {host!r} is not in alerts.allow_hosts "
                                 f"{sorted(allowed)}; no alert is sent to it")
                continue
            secret = _read_secret(hook)
            if secret is None:
                continue
            sink = _WebhookSink(hook, secret)
            self.sinks.append(sink)
            self.hooks[sink.name] = hook
        self.sink_names = [s.name for s in self.sinks]
        self._by_name = {s.name: s for s in self.sinks}

    def replace_settings(self, settings: Settings) -> None:
        """New sinks (SIGHUP): taken up at the start of the next pass (any thread)."""
        self._pending_settings = settings
        self._wake.set()

    # -- one pass --------------------------------------------------------------------
    def deliver_due(self) -> int:
        """Try every notification due now, oldest first; return how many were delivered."""
        if self._pending_settings is not None:
            settings, self._pending_settings = self._pending_settings, None
            self._build_sinks(settings)
            log_event("alert_sinks_reloaded", sinks=[n.split("#")[0] for n in self.sink_names])
        delivered = 0
        now = self.clock()
        failed_sinks: set[str] = set()
        for outbox_id, sink_name, attempts, payload in self.store.deliveries_due(
                self.sink_names, now):
            if self._stop.is_set():
                break
            if sink_name in failed_sinks:   # keep the order: later ones wait their turn
                continue
            sink = self._by_name[sink_name]
            try:
                sink.send(outbox_id, payload)
            except DeliveryFailed as exc:
                failed_sinks.add(sink_name)
                self._failed(outbox_id, sink_name, attempts + 1, str(exc))
                continue
            self.store.record_delivery(outbox_id, sink_name, ok=True, attempts=attempts + 1,
                                       sinks=self.sink_names)
            delivered += 1
            log_event("alert_delivered", logging.DEBUG, notification=outbox_id,
                      sink=sink_name.split("#")[0], attempts=attempts + 1)
        return delivered

    def _failed(self, outbox_id: str, sink_name: str, attempts: int, error: str) -> None:
        hook = self.hooks.get(sink_name)
        retries = hook.retries if hook else 3
        if attempts > retries:
            next_at = float("inf")
            log_event("alert_delivery_gave_up", logging.ERROR, notification=outbox_id,
                      sink=sink_name.split("#")[0], attempts=attempts, detail=error,
                      retry="at the next start of the service")
        else:
            base = hook.backoff_seconds if hook else 1.0
            cap = hook.max_backoff_seconds if hook else 60.0
            delay = min(cap, base * 2 ** (attempts - 1)) * (0.5 + self.rng.random())
            next_at = self.clock() + delay
            log_event("alert_delivery_failed", logging.WARNING, notification=outbox_id,
                      sink=sink_name.split("#")[0], attempts=attempts, detail=error,
                      retry_in=round(delay, 3))
        self.store.record_delivery(outbox_id, sink_name, ok=False, attempts=attempts,
                                   next_at=next_at, error=error, sinks=self.sink_names)

    def pending(self) -> int:
        return len(self.store.pending_alerts())

    def drain(self, timeout: float) -> bool:
        """Deliver until nothing is pending or ``timeout`` seconds pass; True if all went."""
        deadline = time.monotonic() + timeout
        while True:
            self.deliver_due()
            if not self.pending():
                return True
            nxt = self.store.next_delivery_at()
            if nxt is None or nxt == float("inf"):
                return False
            wait = nxt - self.clock()
            if time.monotonic() + max(wait, 0.0) > deadline:
                return False
            time.sleep(max(wait, 0.0))

    # -- thread ----------------------------------------------------------------------
    def wake(self, *_args) -> None:
        self._wake.set()

    def start(self) -> "AlertSender":
        self._thread = threading.Thread(target=self._run, name="shoal-alerts", daemon=True)
        self._thread.start()
        return self

    def _run(self) -> None:
        while not self._stop.is_set():
            try:
                self.deliver_due()
            except Exception as exc:  # noqa: BLE001 - the sender must not die silently
                log_event("alert_sender_error", logging.ERROR,
                          detail=f"{type(exc).__name__}: {exc}")
            nxt = self.store.next_delivery_at()
            wait = 1.0 if nxt is None else min(max(nxt - self.clock(), 0.01), 1.0)
            self._wake.wait(wait)
            self._wake.clear()

    def stop(self, timeout: float = 10.0) -> None:
        self._stop.set()
        self._wake.set()
        if self._thread is not None:
            self._thread.join(timeout)
            if self._thread.is_alive():
                log_event("alert_sender_stuck", logging.ERROR,
                          detail=f"the alert sender did not stop within {timeout} s")
        self.store.close()
