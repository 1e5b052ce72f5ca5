"""Alert delivery after commit: the JSON-lines file and signed webhooks, at least once.

Alerts reach the outbox table in the same transaction as the model version that
raised them; :class:`AlertSender` takes them from there, oldest first and in order
for each sink (one waiting for its retry holds back the later ones), and marks
each sink's delivery in the state store, so a restart delivers whatever was left
undelivered (a notification may then arrive twice; its ``webhook-id`` and the
``Idempotency-Key`` header let the receiver drop the repeat).

Sinks:

* the JSON-lines file (``alerts.file``): one JSON object per line, appended and
  fsynced. On the sender's thread it has a worker of its own, so it never waits for
  a webhook;
* each webhook (``alerts.webhooks``): an HTTP POST of the same JSON, signed by the
  Standard Webhooks specification (https://www.standardwebhooks.com/):

  - ``webhook-id``: the notification id (``<alert id>.<status>``), also sent as
    ``Idempotency-Key``;
  - ``webhook-timestamp``: the attempt's time in whole Unix seconds (each retry is
    signed afresh, so a receiver may refuse old timestamps and with them replays);
  - ``webhook-signature``: ``v1,<base64 HMAC-SHA256 of "<id>.<timestamp>.<body>">``.

  The secret (``secret_file`` or ``secret_env``) is in the specification's format,
  ``whsec_`` followed by the base64 of the key; a secret without that prefix is used
  as its bytes as they stand (a UTF-8 string as its UTF-8 bytes), so a raw secret
  signs with the same key as it always did. Only 2xx counts as delivered; redirects
  are not followed (a 3xx is a failure). ``timeout_seconds`` bounds the whole
  request, from connecting to the last byte of the answer, whatever pace the
  receiver keeps. A failure is retried after ``backoff_seconds * 2^(attempt-1)``
  (capped at ``max_backoff_seconds``) times a random factor in [0.5, 1.5); after
  ``retries`` retries the notification waits for the next start of the service. A
  webhook whose host is not in ``alerts.allow_hosts`` is refused with an error log
  line and never contacted.
"""
from __future__ import annotations

import base64
import binascii
import hashlib
import hmac
import http.client
import logging
import os
import random
import socket
import ssl
import threading
import time
import urllib.parse
from importlib import metadata
from pathlib import Path

from shoal.config import ConfigError, Settings, read_secret_file
from shoal.config.settings import WebhookSettings
from shoal.daemon.errors import ServiceError
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.state.store import StateStore

__all__ = ["AlertSender", "sign", "signing_key", "ID_HEADER", "TIMESTAMP_HEADER",
           "SIGNATURE_HEADER", "IDEMPOTENCY_HEADER", "SECRET_PREFIX", "alert_body"]

ID_HEADER = "webhook-id"
TIMESTAMP_HEADER = "webhook-timestamp"
SIGNATURE_HEADER = "webhook-signature"
IDEMPOTENCY_HEADER = "Idempotency-Key"
SECRET_PREFIX = "whsec_"
_RESPONSE_LIMIT = 65536


def alert_body(payload_text: str) -> bytes:
    """The bytes sent and signed: the payload as stored (sorted keys), UTF-8."""
    return payload_text.encode("utf-8")


def signing_key(secret: bytes) -> bytes:
    """The HMAC key of a secret: ``whsec_<base64>`` decoded, any other secret as it is.

    Raises ``ValueError`` for a ``whsec_`` secret whose rest is not base64."""
    prefix = SECRET_PREFIX.encode()
    if not secret.startswith(prefix):
        return secret
    try:
        key = base64.b64decode(secret[len(prefix):], validate=True)
    except binascii.Error as exc:
        raise ValueError(f"the secret starts with {SECRET_PREFIX!r} but the rest is not "
                         f"base64 ({exc})") from None
    if not key:
        raise ValueError(f"the secret is {SECRET_PREFIX!r} with no key after it")
    return key


def sign(key: bytes, message_id: str, timestamp: int, body: bytes) -> str:
    """``v1,<base64>``: HMAC-SHA256 of ``<id>.<timestamp>.<body>`` under ``key``."""
    signed = f"{message_id}.{timestamp}.".encode("utf-8") + body
    return "v1," + base64.b64encode(hmac.new(key, signed, hashlib.sha256).digest()).decode()


# -- one deadline for a whole request ---------------------------------------------------
_request = threading.local()   # .deadline: time.monotonic() by which the request must end


def _in_time(name: str):
    """The socket method ``name``, waiting at most for the time left to the deadline."""
    def method(self, *args):
        self._time_left()
        return getattr(super(_Deadline, self), name)(*args)
    method.__name__ = method.__qualname__ = name
    return method


class _Deadline:
    """Socket operations that each wait only for the time left to the request's deadline
    (a per-operation timeout lets a receiver that answers a byte at a time hold the
    sender for ever)."""

    def _time_left(self) -> None:
        deadline = getattr(_request, "deadline", None)
        if deadline is not None:
            left = deadline - time.monotonic()
            if left <= 0:
                raise TimeoutError("the request's deadline passed")
            self.settimeout(left)

    recv = _in_time("recv")
    recv_into = _in_time("recv_into")
    send = _in_time("send")
    sendall = _in_time("sendall")


class _DeadlineSocket(_Deadline, socket.socket):
    pass


class _DeadlineSSLSocket(_Deadline, ssl.SSLSocket):
    def do_handshake(self, *args):
        self._time_left()
        return super().do_handshake(*args)


def _connect(address, timeout, source_address=None):
    """``socket.create_connection`` whose socket keeps to the request's deadline."""
    plain = socket.create_connection(address, timeout, source_address)
    return _DeadlineSocket(plain.family, plain.type, plain.proto, fileno=plain.detach())


def _user_agent() -> str:
    try:
        return f"shoal/{metadata.version('shoal')}"
    except metadata.PackageNotFoundError:
        return "shoal"


def _shown(sink_name: str) -> str:
    """A sink's name as logged: without the hash that tells two webhooks apart."""
    return sink_name.split("#")[0]


class DeliveryFailed(ServiceError):
    """A sink did not take a notification (kept in the outbox and retried)."""


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
    def __init__(self, hook: WebhookSettings, key: bytes, clock=time.time):
        self.hook = hook
        self.key = key
        self.clock = clock
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
            context = ssl.create_default_context()
            context.sslsocket_class = _DeadlineSSLSocket
            conn = http.client.HTTPSConnection(u.hostname, u.port, timeout=timeout,
                                               context=context)
        else:
            conn = http.client.HTTPConnection(u.hostname, u.port, timeout=timeout)
        conn._create_connection = _connect
        path = (u.path or "/") + (f"?{u.query}" if u.query else "")
        timestamp = int(self.clock())     # each attempt signed afresh
        headers = {"Content-Type": "application/json", "User-Agent": _user_agent(),
                   ID_HEADER: outbox_id, TIMESTAMP_HEADER: str(timestamp),
                   SIGNATURE_HEADER: sign(self.key, outbox_id, timestamp, body),
                   IDEMPOTENCY_HEADER: outbox_id}
        _request.deadline = time.monotonic() + timeout
        try:
            conn.request("POST", path, body=body, headers=headers)
            resp = conn.getresponse()
            resp.read(_RESPONSE_LIMIT)
        except (OSError, http.client.HTTPException) as exc:
            raise DeliveryFailed(f"POST {self.shown} failed: {type(exc).__name__}: {exc}"
                                 + (f" (the request's deadline is {timeout:g} s)"
                                    if isinstance(exc, TimeoutError) else "")) from exc
        finally:
            _request.deadline = None
            conn.close()
        if 300 <= resp.status < 400:
            raise DeliveryFailed(f"POST {self.shown} answered {resp.status} (redirect to "
                                 f"{resp.getheader('Location')!r} not followed)")
        if not 200 <= resp.status < 300:
            raise DeliveryFailed(f"POST {self.shown} answered {resp.status} {resp.reason}")


def _read_secret(hook: WebhookSettings) -> bytes | None:
    """The webhook's HMAC key (see :func:`signing_key`), or None after an error log line."""
    if hook.secret_file is not None:
        where = {"file": str(hook.secret_file)}
        try:   # a bounded regular file, opened without blocking (not /dev/zero, a FIFO)
            secret = read_secret_file(hook.secret_file)
        except (OSError, ConfigError) as exc:
            log_event("webhook_secret_unreadable", logging.ERROR, **where,
                      detail=exc.strerror if isinstance(exc, OSError) else str(exc))
            return None
    else:
        where = {"variable": hook.secret_env}
        value = os.environ.get(hook.secret_env or "")
        if not value:
            log_event("webhook_secret_missing", logging.ERROR, **where,
                      detail="the environment variable is not set; alerts are not sent to "
                             "this webhook")
            return None
        secret = value.encode("utf-8")
    try:
        return signing_key(secret)
    except ValueError as exc:
        log_event("webhook_secret_invalid", logging.ERROR, **where,
                  detail=f"{exc}; alerts are not sent to this webhook")
        return None


class AlertSender:
    """Deliver the outbox to the sinks, on threads (``start``/``wake``/``stop``: one for the
    file, one for the webhooks, so the file never waits for a webhook) or in passes
    (:meth:`deliver_due`). Opens its own connections to the state store."""

    def __init__(self, settings: Settings, db: Path, *, clock=time.time,
                 rng: random.Random | None = None, webhooks: bool = True):
        self.clock = clock
        self.rng = rng or random.Random()
        self.db = Path(db)
        self.store = StateStore(db, clock=clock)
        self.webhooks = webhooks
        self._pending_settings: Settings | None = None
        self._sinks_lock = threading.Lock()
        self._build_sinks(settings)
        self._wakes = {"file": threading.Event(), "webhook": threading.Event()}
        self._stop = threading.Event()
        self._threads: list[threading.Thread] = []
        self._thread_stores: list[StateStore] = []
        self.store.retry_undelivered_now()

    def _build_sinks(self, settings: Settings) -> None:
        self.settings = settings
        sinks: list = [_FileSink(settings.alerts.file)]
        hooks: dict[str, WebhookSettings] = {}
        allowed = {h.lower() for h in settings.alerts.allow_hosts}
        for hook in settings.alerts.webhooks if self.webhooks else ():
            host = (urllib.parse.urlsplit(hook.url).hostname or "").lower()
            if host not in allowed:
                log_event("webhook_refused", logging.ERROR, host=host,
                          detail=f"webhook host {host!r} is not in alerts.allow_hosts "
                                 f"{sorted(allowed)}; no alert is sent to it")
                continue
            key = _read_secret(hook)
            if key is None:
                continue
            sink = _WebhookSink(hook, key, clock=self.clock)
            sinks.append(sink)
            hooks[sink.name] = hook
        self.sinks, self.hooks = sinks, hooks
        self.sink_names = [s.name for s in sinks]
        self._by_name = {s.name: s for s in sinks}

    def replace_settings(self, settings: Settings) -> None:
        """New sinks (SIGHUP): taken up at the start of the next pass (any thread)."""
        self._pending_settings = settings
        self.wake()

    def _take_new_settings(self) -> None:
        with self._sinks_lock:
            if self._pending_settings is not None:
                settings, self._pending_settings = self._pending_settings, None
                self._build_sinks(settings)
                log_event("alert_sinks_reloaded",
                          sinks=[_shown(n) for n in self.sink_names])

    # -- one pass --------------------------------------------------------------------
    def deliver_due(self, kind: str | None = None, store: StateStore | None = None) -> int:
        """Try every notification due now, oldest first, for the sinks of ``kind`` ("file"
        or "webhook"; None: the file, then the webhooks); return how many were delivered."""
        store = store or self.store
        self._take_new_settings()
        with self._sinks_lock:
            names, by_name = list(self.sink_names), dict(self._by_name)
        groups = [[n for n in names if (n == _FileSink.name) == (k == "file")]
                  for k in (("file", "webhook") if kind is None else (kind,))]
        delivered = 0
        for chosen in groups:
            if chosen:
                delivered += self._deliver(store, chosen, names, by_name)
        return delivered

    def _deliver(self, store: StateStore, chosen: list[str], names: list[str],
                 by_name: dict) -> int:
        delivered = 0
        failed_sinks: set[str] = set()
        for outbox_id, sink_name, attempts, payload in store.deliveries_due(
                chosen, self.clock()):
            if self._stop.is_set():
                break
            if sink_name in failed_sinks:   # keep the order: later ones wait their turn
                continue
            try:
                by_name[sink_name].send(outbox_id, payload)
            except DeliveryFailed as exc:
                failed_sinks.add(sink_name)
                self._failed(store, outbox_id, sink_name, attempts + 1, str(exc), names)
                continue
            store.record_delivery(outbox_id, sink_name, ok=True, attempts=attempts + 1,
                                  sinks=names)
            delivered += 1
            log_event("alert_delivered", logging.DEBUG, notification=outbox_id,
                      sink=_shown(sink_name), attempts=attempts + 1)
        return delivered

    def _failed(self, store: StateStore, outbox_id: str, sink_name: str, attempts: int,
                error: str, names: list[str]) -> None:
        hook = self.hooks.get(sink_name)
        retries = hook.retries if hook else 3
        if attempts > retries:
            next_at = float("inf")
            log_event("alert_delivery_gave_up", logging.ERROR, notification=outbox_id,
                      sink=_shown(sink_name), attempts=attempts, detail=error,
                      retry="at the next start of the service")
        else:
            base = hook.backoff_seconds if hook else 1.0
            cap = hook.max_backoff_seconds if hook else 60.0
            delay = min(cap, base * 2 ** (attempts - 1)) * (0.5 + self.rng.random())
            next_at = self.clock() + delay
            log_event("alert_delivery_failed", logging.WARNING, notification=outbox_id,
                      sink=_shown(sink_name), attempts=attempts, detail=error,
                      retry_in=round(delay, 3))
        store.record_delivery(outbox_id, sink_name, ok=False, attempts=attempts,
                              next_at=next_at, error=error, sinks=names)

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

    # -- threads ---------------------------------------------------------------------
    def wake(self, *_args) -> None:
        for event in self._wakes.values():
            event.set()

    def start(self) -> "AlertSender":
        """One thread for the file and one for the webhooks, each with its own connection
        to the state store."""
        for kind in ("file", "webhook"):
            store = self.store if kind == "file" else StateStore(self.db, clock=self.clock)
            if store is not self.store:
                self._thread_stores.append(store)
            thread = threading.Thread(target=self._run, args=(kind, store),
                                      name=f"shoal-alerts-{kind}", daemon=True)
            self._threads.append(thread)
            thread.start()
        return self

    def _run(self, kind: str, store: StateStore) -> None:
        wake = self._wakes[kind]
        while not self._stop.is_set():
            try:
                self.deliver_due(kind, store)
            except Exception as exc:  # noqa: BLE001 - the sender must not die silently
                log_event("alert_sender_error", logging.ERROR, sink_kind=kind,
                          detail=f"{type(exc).__name__}: {exc}")
            nxt = store.next_delivery_at()
            wait = 1.0 if nxt is None else min(max(nxt - self.clock(), 0.01), 1.0)
            wake.wait(wait)
            wake.clear()

    def stop(self, timeout: float = 10.0) -> None:
        self._stop.set()
        self.wake()
        end = time.monotonic() + timeout
        stuck = False
        for thread in self._threads:
            thread.join(max(end - time.monotonic(), 0.0))
            stuck = stuck or thread.is_alive()
        if stuck:
            log_event("alert_sender_stuck", logging.ERROR,
                      detail=f"the alert sender did not stop within {timeout} s")
        else:
            for store in self._thread_stores:
                store.close()
        self.store.close()
