"""Webhook signatures by the Standard Webhooks specification, and one deadline per request.

The receivers are real HTTP servers on loopback. The signature is checked by the
specification's algorithm written out in ``tests/support/_webhook.py``, not by shoal's code.
"""
import base64
import http.client
import json
import socket
import threading
import time

import pytest

from shoal.config import load_config
from shoal.daemon.alerts.delivery import AlertSender
from drills import wait_until, write_config
from shoal.daemon.files.layout import prepare_folders
from shoal.daemon.state.store import LedgerEntry, StateStore

from _webhook import VerifyingReceiver, log, spec_key, spec_verify  # noqa: F401 (log)

KEY = bytes(range(32))                      # 32 random-looking key bytes (invented)
WHSEC = "whsec_" + base64.b64encode(KEY).decode()
RAW = "a raw secret, as shoal took it before"


def _events(log, name):
    return [json.loads(x) for x in log.getvalue().splitlines() if f'"{name}"' in x]


def _settings(tmp_path, url, secret, monkeypatch, where="env", **hook):
    if where == "env":
        monkeypatch.setenv("HOOK_SECRET", secret)
        source = {"secret_env": "HOOK_SECRET"}
    else:
        (tmp_path / "hook.secret").write_text(secret + "\n")
        source = {"secret_file": "hook.secret"}
    webhook = {"url": url, "timeout_seconds": 5.0, "backoff_seconds": 0.05,
               "max_backoff_seconds": 0.1, "retries": 3, **source, **hook}
    settings = load_config(write_config(tmp_path, alerts={"webhooks": [webhook],
                                                          "allow_hosts": ["127.0.0.1"]}))
    prepare_folders(settings)
    return settings


def _commit_alerts(settings, *ids):
    """Raised drift notifications straight into the outbox, one input each."""
    store = StateStore(settings.state / "state.db")
    try:
        for n, alert in enumerate(ids):
            payload = {"schema_version": 1, "id": alert, "kind": "drift", "status": "raised",
                       "severity": "major", "segment": 1, "statistic": "mean_shift",
                       "value": 0.4, "bound": 0.3}
            store.commit_input(LedgerEntry(digest=f"{n:064d}", name=f"in-{n}.csv", size=1,
                                           outcome="committed", rows=1, seen_at=1.0,
                                           finished_at=1.0),
                               learned=True, alerts=[(f"{alert}.raised", payload)])
    finally:
        store.close()


def _repost(url_port, headers, body):
    conn = http.client.HTTPConnection("127.0.0.1", url_port, timeout=10)
    try:
        conn.request("POST", "/hook", body=body, headers=headers)
        resp = conn.getresponse()
        resp.read()
        return resp.status
    finally:
        conn.close()


@pytest.mark.parametrize("secret,where", [(WHSEC, "env"), (WHSEC, "file"), (RAW, "env"),
                                          (RAW, "file")],
                         ids=["whsec-env", "whsec-file", "raw-env", "raw-file"])
def test_the_receiver_verifies_by_the_specification_and_refuses_a_changed_byte(
        tmp_path, monkeypatch, secret, where):
    with VerifyingReceiver(spec_key(secret)) as receiver:
        settings = _settings(tmp_path, receiver.url, secret, monkeypatch, where)
        _commit_alerts(settings, "drift-a")
        sender = AlertSender(settings, settings.state / "state.db")
        try:
            assert sender.deliver_due() == 2          # the file and the webhook
        finally:
            sender.stop()
        (status, reason, headers, body), = receiver.taken()
        assert (status, reason) == (204, None)
        assert headers["webhook-id"] == "drift-a.raised" == headers["Idempotency-Key"]
        assert abs(int(headers["webhook-timestamp"]) - time.time()) < 60
        assert headers["webhook-signature"].startswith("v1,")
        # the body altered by one byte, same headers: refused
        changed = bytearray(body)
        changed[len(changed) // 2] ^= 0x01
        assert _repost(receiver.port, headers, bytes(changed)) == 401
        assert receiver.taken()[-1][1] == "no signature matches"
        # the same request unchanged still verifies (so the refusal was the byte)
        assert _repost(receiver.port, headers, body) == 204


def test_a_request_signed_10_minutes_ago_is_refused(tmp_path, monkeypatch, log):
    with VerifyingReceiver(KEY) as receiver:
        settings = _settings(tmp_path, receiver.url, WHSEC, monkeypatch, retries=0)
        _commit_alerts(settings, "drift-old")
        sender = AlertSender(settings, settings.state / "state.db",
                             clock=lambda: time.time() - 600)
        try:
            sender.deliver_due()
        finally:
            sender.stop()
        (status, reason, headers, _), = receiver.taken()
    assert (status, reason) == (401, "timestamp outside the tolerance")
    assert time.time() - int(headers["webhook-timestamp"]) >= 600
    gave_up = _events(log, "alert_delivery_gave_up")
    assert gave_up and "401" in gave_up[0]["detail"]


def test_a_retried_delivery_carries_a_fresh_timestamp_and_signature(tmp_path, monkeypatch):
    offset = [0.0]
    with VerifyingReceiver(KEY) as receiver:
        receiver.failures = 1
        settings = _settings(tmp_path, receiver.url, WHSEC, monkeypatch)
        _commit_alerts(settings, "drift-r")
        start = time.time()                       # a clock that moves only when told
        sender = AlertSender(settings, settings.state / "state.db",
                             clock=lambda: start + offset[0])
        try:
            sender.deliver_due()                  # answered 500: a retry is due shortly
            offset[0] = 5.0                       # the retry goes 5 s later
            sender.deliver_due()
        finally:
            sender.stop()
        first, second = receiver.taken()
    assert (first[0], second[0]) == (500, 204)
    assert first[2]["webhook-id"] == second[2]["webhook-id"] == "drift-r.raised"
    assert int(second[2]["webhook-timestamp"]) - int(first[2]["webhook-timestamp"]) == 5
    assert first[2]["webhook-signature"] != second[2]["webhook-signature"]
    assert first[3] == second[3]                  # the same body, signed anew
    assert spec_verify(first[2], first[3], KEY) is None
    assert spec_verify(second[2], second[3], KEY) is None


def test_a_whsec_secret_that_is_not_base64_is_refused_with_a_clear_line(tmp_path, monkeypatch,
                                                                        log):
    settings = _settings(tmp_path, "http://127.0.0.1:9/hook", "whsec_not*base64!",
                         monkeypatch)
    sender = AlertSender(settings, settings.state / "state.db")
    try:
        assert sender.sink_names == ["file"]
    finally:
        sender.stop()
    bad = _events(log, "webhook_secret_invalid")
    assert bad and bad[0]["variable"] == "HOOK_SECRET" and "base64" in bad[0]["detail"]


# ------------------------------------------------------------------ a slow receiver


class DripReceiver:
    """Accepts a connection, reads the request, then answers one byte every ``pace``
    seconds, a header line that never ends, until the client goes or ``close``."""

    def __init__(self, pace: float = 1.5):
        self.pace = pace
        self.sock = socket.create_server(("127.0.0.1", 0))
        self.sock.settimeout(0.2)
        self.port = self.sock.getsockname()[1]
        self.url = f"http://127.0.0.1:{self.port}/hook"
        self.done = threading.Event()
        self.connections = 0
        self.open = 0
        self.bytes_sent = 0
        self.lock = threading.Lock()
        self.thread = threading.Thread(target=self._serve, name="drip", daemon=True)
        self.workers = []

    def _serve(self):
        while not self.done.is_set():
            try:
                conn, _ = self.sock.accept()
            except (TimeoutError, socket.timeout):
                continue
            with self.lock:
                self.connections += 1
                self.open += 1
            worker = threading.Thread(target=self._drip, args=(conn,), name="drip-conn",
                                      daemon=True)
            self.workers.append(worker)
            worker.start()

    def _drip(self, conn):
        try:
            conn.settimeout(5)
            conn.recv(65536)                       # the request (small)
            answer = b"HTTP/1.1 200 OK\r\nX-Slow: " + b"a" * 100000
            for byte in answer:
                if self.done.wait(self.pace):
                    break
                conn.sendall(bytes([byte]))
                with self.lock:
                    self.bytes_sent += 1
        except OSError:
            pass                                   # the client hung up: as it should
        finally:
            conn.close()
            with self.lock:
                self.open -= 1

    def __enter__(self):
        self.thread.start()
        return self

    def __exit__(self, *exc):
        self.done.set()
        self.thread.join(5)
        for w in self.workers:
            w.join(5)
        self.sock.close()


def test_a_receiver_dripping_one_byte_every_1_5_s_does_not_hold_the_sender(tmp_path,
                                                                           monkeypatch, log):
    # timeout_seconds is one deadline for the whole request: a per-read timeout of 2 s
    # never fires against a byte every 1.5 s, and the header line never ends.
    with DripReceiver(pace=1.5) as drip:
        settings = _settings(tmp_path, drip.url, WHSEC, monkeypatch, timeout_seconds=2.0,
                             retries=0)
        _commit_alerts(settings, "drift-slow")
        sender = AlertSender(settings, settings.state / "state.db")
        worker = threading.Thread(target=sender.deliver_due, name="deliver")
        worker.start()
        worker.join(30)                            # a bound, far above the 2 s deadline
        finished = not worker.is_alive()
        drip.done.set()                            # let a stuck request end before asserting
        worker.join(10)
        sender.stop()
    assert finished, "the delivery was still waiting on the slow receiver after 30 s"
    gave_up = _events(log, "alert_delivery_gave_up")
    assert gave_up and "deadline" in gave_up[0]["detail"], gave_up
    assert drip.bytes_sent < 10                    # it was cut off, not read to the end


def test_the_alert_file_does_not_wait_for_a_slow_webhook(tmp_path, monkeypatch):
    # A webhook with a long deadline is held by the drip receiver; alerts committed
    # meanwhile still reach the JSON-lines file at once.
    with DripReceiver(pace=1.5) as drip:
        settings = _settings(tmp_path, drip.url, WHSEC, monkeypatch, timeout_seconds=120.0,
                             retries=0)
        sender = AlertSender(settings, settings.state / "state.db").start()
        try:
            _commit_alerts(settings, "drift-first")
            sender.wake()
            wait_until(lambda: drip.open == 1, 20, "the webhook request under way")
            store = StateStore(settings.state / "state.db")
            try:
                store.commit_input(LedgerEntry(digest="f" * 64, name="later.csv", size=1,
                                               outcome="committed", rows=1, seen_at=2.0,
                                               finished_at=2.0), learned=True,
                                   alerts=[("drift-second.raised",
                                            {"id": "drift-second", "status": "raised"})])
            finally:
                store.close()
            sender.wake()
            wait_until(lambda: "drift-second" in settings.alerts.file.read_text(), 20,
                       "the second alert in the file")
            assert drip.open == 1 and drip.connections == 1   # the webhook is still held
        finally:
            drip.done.set()                        # the held request ends; the sender stops
            sender.stop(timeout=20)
    lines = [json.loads(x)["id"] for x in settings.alerts.file.read_text().splitlines()]
    assert lines == ["drift-first", "drift-second"]
