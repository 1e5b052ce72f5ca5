"""Alert delivery against a real HTTP server on loopback.

The receiver is ``http.server`` on 127.0.0.1, started by the test. Alerts come from
the real pipeline (a group of rows moves); the sender is the one ``shoal watch`` and
``shoal ingest`` run (:func:`shoal.daemon.cli.alert_commands.alert_delivery`).
"""
import dataclasses
import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from shoal.config import load_config
from shoal.daemon.cli.alert_commands import alert_delivery
from shoal.daemon.cli.main import open_service_parts
from shoal.daemon.alerts.delivery import AlertSender
from drills import wait_until, write_config
from shoal.daemon.state.store import StateStore

from _webhook import LoopbackReceiver, log, spec_verify  # noqa: F401 (log)

SECRET = b"test-secret-\x01\x02 not for production"
CENTRES = np.array([[0.0, 0.0, 0.0], [6.0, 0.0, 1.0], [0.0, 6.0, -1.0]])


class Receiver(LoopbackReceiver):
    """A webhook receiver: answers 500 while ``failures`` remain (or always when down)."""

    def __init__(self):
        self.down = False
        self.failures = 0
        super().__init__(self._decide)

    def _decide(self, path, headers, body):
        with self.lock:
            if path == "/moved":
                status = 302
            elif self.down or self.failures > 0:
                self.failures = max(self.failures - 1, 0)
                status = 500
            else:
                status = 200
            self.requests.append((path, status, dict(headers), body))
        return status, ({"Location": f"http://127.0.0.1:{self.port}/elsewhere"}
                        if status == 302 else {})

    def accepted(self):
        with self.lock:
            return [r for r in self.requests if r[1] == 200]

    def count(self, status=None):
        with self.lock:
            return sum(1 for r in self.requests if status is None or r[1] == status)


@pytest.fixture
def receiver():
    with Receiver() as r:
        yield r


def _drops(folder, n_still=6, n_moved=4, rows=1000, seed=21):
    """Parquet drops of three groups; from drop ``n_still`` on group 0 sits 3 sds higher."""
    rng = np.random.default_rng(seed)
    paths = []
    for i in range(n_still + n_moved):
        group = rng.choice(3, size=rows, p=[0.5, 0.3, 0.2])
        X = CENTRES[group] + rng.standard_normal((rows, 3))
        if i >= n_still:
            X[group == 0, 0] += 3.0
        path = folder / f"drop-{i:03d}.parquet"
        pq.write_table(pa.table({"f1": X[:, 0], "f2": X[:, 1], "f3": X[:, 2]}), path)
        paths.append(path)
    return paths


def _settings(tmp_path, receiver, **hook):
    (tmp_path / "secret.txt").write_bytes(SECRET + b"\n")
    webhook = {"url": f"http://127.0.0.1:{receiver.port}/hook", "secret_file": "secret.txt",
               "timeout_seconds": 2.0, "backoff_seconds": 0.05, "max_backoff_seconds": 0.2,
               **hook}
    cfg = write_config(
        tmp_path, passthrough=[], segments=3,
        drift={"window_rows": 500, "settle_rows": 1000, "persist": 2},
        alerts={"webhooks": [webhook,
                             {"url": "http://hooks.blocked.invalid/x", "secret_env": "NOPE"}],
                "allow_hosts": ["127.0.0.1"]})
    return load_config(cfg)


def _outbox(settings):
    store = StateStore(settings.state / "state.db")
    try:
        return store.alerts()
    finally:
        store.close()


def _check_accepted(receiver, outbox):
    """Every notification accepted exactly once, signed with the secret, keyed by its id."""
    accepted = receiver.accepted()
    keys = [r[2]["Idempotency-Key"] for r in accepted]
    assert sorted(keys) == sorted(a["notification"] for a in outbox)   # each exactly once
    for path, _, headers, body in accepted:
        assert path == "/hook"
        # signed by the Standard Webhooks scheme under the raw secret's own bytes
        # (verified by the specification's algorithm, tests/support/_webhook.py)
        assert spec_verify(headers, body, SECRET) is None
        payload = json.loads(body)
        assert headers["Idempotency-Key"] == f"{payload['id']}.{payload['status']}"
        assert headers["webhook-id"] == headers["Idempotency-Key"]
        assert payload["kind"] == "drift" and payload["explanation"]["summary"]
    headers, body = accepted[0][2], accepted[0][3]
    assert spec_verify(headers, body, b"other") == "no signature matches"


def test_a_receiver_failing_its_first_3_requests_gets_each_alert_once(tmp_path, receiver,
                                                                      log):
    settings = _settings(tmp_path, receiver)
    receiver.failures = 3
    with alert_delivery(open_service_parts, settings) as (layout, store, pipeline):
        for path in _drops(tmp_path):
            assert pipeline.process(path, in_inbox=False).outcome == "committed"
        wait_until(lambda: all(a["delivered_at"] for a in _outbox(settings)), 30,
                   "every alert delivered")
    outbox = _outbox(settings)
    assert len(outbox) >= 2, "the moved group should raise alerts"
    assert receiver.count(500) == 3
    _check_accepted(receiver, outbox)
    retried = [json.loads(x) for x in log.getvalue().splitlines()
               if '"alert_delivery_failed"' in x]
    assert [r["attempts"] for r in retried] == [1, 2, 3]     # backoff, then accepted
    assert all("500" in r["detail"] for r in retried)


def test_undelivered_alerts_are_delivered_after_a_restart(tmp_path, receiver, log):
    settings = _settings(tmp_path, receiver)
    drops = _drops(tmp_path)

    # Run 1: the receiver is down. Alerts are committed with their model versions and
    # written to the JSON-lines file; the webhook keeps failing; the service stops.
    receiver.down = True
    with alert_delivery(open_service_parts, settings) as (layout, store, pipeline):
        for path in drops:
            assert pipeline.process(path, in_inbox=False).outcome == "committed"
        wait_until(lambda: receiver.count(500) >= 2, 20, "failed webhook attempts")
    outbox = _outbox(settings)
    assert len(outbox) >= 2, "the moved group should raise alerts"
    assert all(a["delivered_at"] is None for a in outbox)
    lines = [json.loads(x) for x in settings.alerts.file.read_text().splitlines()]
    assert [(x["id"], x["status"]) for x in lines] == \
        [(a["payload"]["id"], a["payload"]["status"]) for a in outbox]

    # The host outside the allow-list was refused with a clear log line.
    refused = [json.loads(x) for x in log.getvalue().splitlines()
               if '"webhook_refused"' in x]
    assert refused and refused[0]["host"] == "hooks.blocked.invalid"
    assert "not in alerts.allow_hosts" in refused[0]["detail"]

    # Run 2 (a restart): the receiver is back and accepts.
    receiver.down = False
    with alert_delivery(open_service_parts, settings):
        wait_until(lambda: all(a["delivered_at"] for a in _outbox(settings)), 30,
                   "every alert delivered after the restart")
    _check_accepted(receiver, outbox)
    # the file sink was not written twice
    assert len(settings.alerts.file.read_text().splitlines()) == len(outbox)


def test_redirects_are_not_followed(tmp_path, receiver, log):
    settings = _settings(tmp_path, receiver, retries=0)
    hook = dataclasses.replace(settings.alerts.webhooks[0],
                               url=f"http://127.0.0.1:{receiver.port}/moved")
    settings = dataclasses.replace(
        settings, alerts=dataclasses.replace(settings.alerts, webhooks=(hook,)))
    drops = _drops(tmp_path)
    with open_service_parts(settings) as (layout, store, pipeline):
        for path in drops:
            pipeline.process(path, in_inbox=False)
    sender = AlertSender(settings, settings.state / "state.db")
    try:
        sender.deliver_due()
        assert receiver.count() == 1 and receiver.requests[0][0] == "/moved"
        failed = [json.loads(x) for x in log.getvalue().splitlines()
                  if '"alert_delivery_gave_up"' in x]
        assert failed and "302" in failed[0]["detail"] and "not followed" in failed[0]["detail"]
        assert all(a["delivered_at"] is None for a in _outbox(settings))
        # a reload (SIGHUP) with the right URL: the sender takes the new sink and delivers
        fixed = dataclasses.replace(hook, url=f"http://127.0.0.1:{receiver.port}/hook")
        sender.replace_settings(dataclasses.replace(
            settings, alerts=dataclasses.replace(settings.alerts, webhooks=(fixed,))))
        sender.deliver_due()
    finally:
        sender.stop()
    assert all(a["delivered_at"] for a in _outbox(settings))
    assert len(receiver.accepted()) == len(_outbox(settings))
