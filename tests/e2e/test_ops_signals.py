"""A real `shoal watch` process and the service manager's side of it: the notify socket
and SIGHUP reloads."""
import signal
import socket
import time

import pytest
import yaml

from _ops import Watch, demo_config, demo_drops, notify_socket
from drills import ledger_counts, wait_until


def _collect(sock: socket.socket, until, timeout: float) -> list[str]:
    """Datagrams received until ``until(messages)`` is true; TimeoutError after ``timeout``."""
    got: list[str] = []
    deadline = time.monotonic() + timeout
    while not until(got):
        left = deadline - time.monotonic()
        if left <= 0:
            raise TimeoutError(f"notify messages so far: {got}")
        sock.settimeout(min(left, 1.0))
        try:
            got.append(sock.recv(4096).decode())
        except socket.timeout:
            continue
    return got


def _fields(message: str) -> dict:
    return dict(line.split("=", 1) for line in message.splitlines())


@pytest.mark.parametrize("kind", ["abstract", "path"])
def test_notify_socket_gets_ready_then_watchdog_and_stopping_on_sigterm(tmp_path, kind):
    cfg = demo_config(tmp_path)
    sock, name = notify_socket(tmp_path, kind)
    watch = Watch(cfg, tmp_path / "watch.log",
                  env={"NOTIFY_SOCKET": name, "WATCHDOG_USEC": "400000"})
    try:
        def ready_then_ping(msgs):
            fields = [_fields(m) for m in msgs]
            r = next((i for i, f in enumerate(fields) if f.get("READY") == "1"), None)
            return r is not None and any(f.get("WATCHDOG") == "1" for f in fields[r + 1:])

        before = _collect(sock, ready_then_ping, timeout=60)
        fields = [_fields(m) for m in before]
        first_ready = next(i for i, f in enumerate(fields) if f.get("READY") == "1")
        # Nothing is pinged before READY=1, and READY=1 carries a STATUS line.
        assert not any(f.get("WATCHDOG") for f in fields[:first_ready])
        assert "STATUS" in fields[first_ready]
        pings = sum(f.get("WATCHDOG") == "1" for f in fields)
        watch.proc.send_signal(signal.SIGTERM)
        after = _collect(sock, lambda m: any(_fields(x).get("STOPPING") == "1" for x in m),
                         timeout=20)
        assert watch.proc.wait(timeout=20) == 0
        assert pings >= 1 and after
    finally:
        watch.kill()
        sock.close()


def _write(cfg, data):
    cfg.write_text(yaml.safe_dump(data))


def test_sighup_changes_behaviour_without_restart_and_refuses_a_broken_config(tmp_path):
    # The bound changed here is limits.max_rows (inputs past it are quarantined): it is
    # read for each input, like the drift bounds and sinks, which reload the same way.
    cfg = demo_config(tmp_path)
    base = yaml.safe_load(cfg.read_text())
    db = tmp_path / "state" / "state.db"
    inbox = tmp_path / "inbox"
    watch = Watch(cfg, tmp_path / "watch.log")
    try:
        watch.wait_event("service_ready", timeout=60)
        demo_drops(inbox, 1, 500, start=0)
        wait_until(lambda: ledger_counts(db).get("committed", 0) == 1, 60, "first commit")

        _write(cfg, {**base, "limits": {"max_rows": 400}})
        watch.proc.send_signal(signal.SIGHUP)
        reloaded = watch.wait_event("config_reloaded", timeout=30)
        assert reloaded["changed"] == ["limits.max_rows"]
        demo_drops(inbox, 1, 500, start=1)                       # 500 rows > 400 now
        wait_until(lambda: ledger_counts(db).get("quarantined", 0) == 1, 60, "quarantine")

        _write(cfg, {**base, "limits": {"max_rows": "lots"}})      # broken: refused
        watch.proc.send_signal(signal.SIGHUP)
        refused = watch.wait_event("config_reload_refused", timeout=30)
        assert "limits.max_rows" in refused["detail"] and refused["kept"]
        demo_drops(inbox, 1, 500, start=2)                       # the old 400 still holds
        wait_until(lambda: ledger_counts(db).get("quarantined", 0) == 2, 60, "2nd quarantine")

        _write(cfg, {**base, "features": base["features"][:2]})   # fixed setting: refused
        watch.proc.send_signal(signal.SIGHUP)
        refused = watch.wait_event("config_reload_refused", timeout=30, count=2)
        assert refused["detail"].startswith("features") and "restart" in refused["detail"]
        demo_drops(inbox, 1, 300, start=3)                       # 300 <= 400: committed
        wait_until(lambda: ledger_counts(db).get("committed", 0) == 2, 60, "second commit")
        assert watch.proc.poll() is None
        assert len(watch.events("service_started")) == 1          # never restarted
        assert watch.stop() == 0
    finally:
        watch.kill()
    quarantined = list((tmp_path / "state" / "quarantine").glob("*.json"))
    assert len(quarantined) == 2
    assert all("too_many_rows" in p.read_text() for p in quarantined)


def test_sighup_with_a_changed_drift_bound_changes_alerting_without_restart(tmp_path):
    # Stationary demo rows: the default bounds raise nothing; after SIGHUP with a
    # weight_change bound far below any real move (and no noise margin), the next
    # evaluation windows fire weight_change alerts in the same process.
    drift = {"settle_rows": 2000, "window_rows": 1000}
    cfg = demo_config(tmp_path, drift=drift)
    base = yaml.safe_load(cfg.read_text())
    inbox = tmp_path / "inbox"
    db = tmp_path / "state" / "state.db"
    watch = Watch(cfg, tmp_path / "watch.log")
    try:
        watch.wait_event("service_ready", timeout=60)
        demo_drops(inbox, 12, 500, start=0)       # warm-up 2000, reference at 4000, 2 windows
        wait_until(lambda: ledger_counts(db).get("committed", 0) == 12, 90, "12 commits")
        watch.wait_event("drift_baseline_taken", timeout=10)
        assert watch.events("alert_raised") == []

        _write(cfg, {**base, "drift": {**drift, "noise_multiple": 0.0, "persist": 1,
                                       "bounds": {"weight_change": 1e-6}}})
        watch.proc.send_signal(signal.SIGHUP)
        reloaded = watch.wait_event("config_reloaded", timeout=30)
        assert "drift.bounds.weight_change" in reloaded["changed"]
        demo_drops(inbox, 4, 500, start=12)       # two more windows under the new bound
        raised = watch.wait_event("alert_raised", timeout=60)
        assert raised["statistic"] == "weight_change" and raised["bound"] == 1e-6
        assert len(watch.events("service_started")) == 1          # never restarted
        assert watch.stop() == 0
    finally:
        watch.kill()
