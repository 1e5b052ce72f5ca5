"""In-process checks of the operating parts: /healthz when the worker stops or stalls, the
notify client, reload rules, progress bars, and alerts read from the store by `shoal status` and /metrics."""
import io
import json
import threading
import uuid

import pytest
from prometheus_client.parser import text_string_to_metric_families

from _ops import get, notify_socket
from shoal.config import ConfigError, load_config
from drills import synthetic_table, wait_until, write_config, write_drop
from shoal.daemon.files.layout import prepare_folders
from shoal.daemon.runtime.notify import Notifier, watchdog_interval
from shoal.daemon.ingest.pipeline import Pipeline, Result
from shoal.daemon.state.store import LedgerEntry, StateStore
from shoal.daemon.runtime.supervise import Supervisor


class _Running:
    """A Supervisor (worker + endpoint on a free loopback port) on this process's threads."""

    def __init__(self, folder, **overrides):
        self.config = write_config(folder, http={"port": 0}, **overrides)
        self.settings = load_config(self.config)
        self.layout = prepare_folders(self.settings)
        self.store = StateStore(self.layout.db)
        self.pipeline = Pipeline(self.settings, self.layout, self.store)
        self.sup = Supervisor(self.settings, self.layout, self.pipeline, notifier=Notifier({}),
                              config_path=self.config)

    def __enter__(self):
        self.sup.start()
        host, port = self.sup.http_address
        self.url = f"http://{host}:{port}/"
        return self

    def __exit__(self, *exc):
        self.sup.shutdown(timeout=30)
        assert not self.sup.worker.is_alive()
        self.store.close()

    def healthz(self):
        status, _, body = get(self.url + "healthz", timeout=10)
        return status, json.loads(body)


def test_healthz_turns_unhealthy_when_the_worker_is_stopped(tmp_path):
    with _Running(tmp_path) as run:
        wait_until(lambda: run.healthz()[0] == 200, 30, "a healthy worker")
        assert get(run.url + "readyz")[0] == 200
        run.sup.service.request_stop()             # the worker ends; the endpoint stays up
        run.sup.worker.join(30)
        status, body = run.healthz()
        assert status == 503 and body["status"] == "unhealthy"
        assert body["checks"]["worker_alive"] is False
        assert get(run.url + "readyz")[0] == 503
        metrics = {f.name: f for f in text_string_to_metric_families(
            get(run.url + "metrics")[2].decode())}
        assert metrics["shoal_worker_healthy"].samples[0].value == 0.0


def test_healthz_turns_unhealthy_when_the_worker_stalls_on_an_input(tmp_path):
    with _Running(tmp_path, watch={"stall_seconds": 1.0}) as run:
        release = threading.Event()
        entered = threading.Event()

        def stuck(path, in_inbox):                  # an input that never makes progress
            entered.set()
            release.wait(20)
            return Result("vanished", path.name)

        run.pipeline._process_one = stuck
        wait_until(lambda: run.healthz()[0] == 200, 30, "a healthy worker")
        write_drop(synthetic_table(0, 50, seed=3), run.layout.inbox, "stuck.csv")
        assert entered.wait(30)
        try:
            wait_until(lambda: run.healthz()[0] == 503, 10, "a stalled worker")
            status, body = run.healthz()
            assert body["checks"]["worker_alive"] is True
            assert body["checks"]["progress_age_seconds"] > 1.0
        finally:
            release.set()
        wait_until(lambda: run.healthz()[0] == 200, 10, "the worker moving again")


def test_reload_reaches_the_worker_and_the_settings_listeners(tmp_path):
    with _Running(tmp_path) as run:
        heard = []
        run.pipeline.settings_listeners = [heard.append]
        wait_until(lambda: run.healthz()[0] == 200, 30, "a healthy worker")
        write_config(tmp_path, http={"port": 0}, limits={"max_rows": 123})
        run.sup._reload()                            # what SIGHUP asks the main loop to do
        wait_until(lambda: heard, 10, "the listener called on the worker")
        assert heard[0].limits.max_rows == 123
        assert run.pipeline.settings is heard[0] and run.sup.service.settings is heard[0]


@pytest.mark.parametrize("kind", ["abstract", "path"])
def test_notifier_sends_datagrams_to_path_and_abstract_sockets(tmp_path, kind):
    sock, name = notify_socket(tmp_path, kind)
    sock.settimeout(5)
    n = Notifier({"NOTIFY_SOCKET": name, "WATCHDOG_USEC": "2000000"})
    try:
        assert n.enabled and n.watchdog_seconds == 2.0
        assert n.ready("warming up\nsecond line")
        assert sock.recv(4096) == b"READY=1\nSTATUS=warming up second line"
        assert n.watchdog()
        assert sock.recv(4096) == b"WATCHDOG=1"
        assert n.stopping()
        assert sock.recv(4096) == b"STOPPING=1"
    finally:
        n.close()
        sock.close()


def test_notifier_without_a_socket_and_watchdog_for_another_process():
    assert Notifier({}).send(READY=1) is False
    assert watchdog_interval({"WATCHDOG_USEC": "500000"}) == 0.5
    assert watchdog_interval({"WATCHDOG_USEC": "500000", "WATCHDOG_PID": "1"}, pid=2) is None
    assert watchdog_interval({"WATCHDOG_USEC": "0"}) is None
    missing = Notifier({"NOTIFY_SOCKET": "@shoal-nobody-listens-" + uuid.uuid4().hex})
    assert missing.send(READY=1) is False       # logged once, never raised
    missing.close()


def test_reload_accepts_reloadable_keys_and_names_fixed_ones(tmp_path):
    from shoal.daemon.runtime.reload import check_reloadable

    old = load_config(write_config(tmp_path / "a"))
    new = load_config(write_config(tmp_path / "a", log_level="debug",
                                   limits={"max_rows": 10}))
    assert check_reloadable(old, new) == ["limits.max_rows", "log_level"]
    moved = load_config(write_config(tmp_path / "a", seed=5, http={"port": 8080}))
    with pytest.raises(ConfigError, match=r"^http.port, seed: cannot change while running"):
        check_reloadable(old, moved)


def test_progress_bar_only_on_a_terminal():
    from tqdm import tqdm

    from shoal.daemon.runtime.progress import progress

    class Tty(io.StringIO):
        def isatty(self):
            return True

    items = [1, 2, 3]
    assert progress(items, stream=io.StringIO()) is items
    tty = Tty()
    bar = progress(items, total=3, desc="inputs", stream=tty)
    assert isinstance(bar, tqdm) and list(bar) == items
    assert "inputs" in tty.getvalue()


def test_status_and_metrics_read_alerts_written_through_the_store(tmp_path):
    from shoal.daemon.runtime.metrics import build_registry, render_metrics
    from shoal.daemon.state.readout import StateReader, state_snapshot
    from shoal.daemon.views.status_text import format_status

    settings = load_config(write_config(tmp_path))
    layout = prepare_folders(settings)
    store = StateStore(layout.db)
    # One row per notification, as the drift layer writes them: a1 is raised; a2 is raised
    # and cleared (its cleared notification committed with a later input).
    payloads = [("a1.raised", {"id": "a1", "status": "raised", "severity": "critical",
                               "segment": 2, "statistic": "mean_shift", "value": 1.7,
                               "bound": 0.5}),
                ("a2.raised", {"id": "a2", "status": "raised", "severity": "major",
                               "segment": 1, "statistic": "weight_change", "value": 0.07,
                               "bound": 0.05})]
    cleared = [("a2.cleared", {"id": "a2", "status": "cleared", "severity": "major",
                                 "segment": 1, "statistic": "weight_change", "value": 0.01,
                                 "bound": 0.05})]
    store.commit_input(LedgerEntry(digest="0" * 64, name="x.csv", size=10, outcome="committed",
                                   rows=5, rows_invalid=1, seen_at=100.0, finished_at=100.5),
                       learned=True, alerts=payloads)
    store.commit_input(LedgerEntry(digest="1" * 64, name="y.csv", size=10, outcome="committed",
                                   rows=5, rows_invalid=0, seen_at=102.0, finished_at=102.5),
                       learned=True, alerts=cleared)
    store.record_quarantine(LedgerEntry(digest=None, name="bad.csv", size=3,
                                        outcome="quarantined", reason="bad_row: line 2",
                                        seen_at=101.0, finished_at=101.1))
    reader = StateReader(layout.db)
    try:
        snap = state_snapshot(reader, settings, layout, now=200.0)
        assert snap["alert_counts"] == {"raised/critical": 1, "raised/major": 1,
                                        "cleared/major": 1}
        assert snap["alerts_active"] == 1          # a2's latest notification cleared it
        assert snap["last_error"]["name"] == "bad.csv"
        text = format_status(snap)
        assert "1 raised/critical" in text and "bad_row: line 2" in text
        assert "segment 2 mean_shift value 1.7 bound 0.5" in text
        fams = {f.name: f for f in text_string_to_metric_families(
            render_metrics(build_registry(reader)).decode())}
        alerts = {(s.labels["status"], s.labels["severity"]): s.value
                  for s in fams["shoal_alert_notifications"].samples
                  if s.name.endswith("_total")}
        assert alerts == {("raised", "critical"): 1, ("raised", "major"): 1,
                          ("cleared", "major"): 1}
        raised = {s.labels["severity"]: s.value for s in fams["shoal_alerts_active"].samples}
        assert raised == {"critical": 1, "major": 0}
        assert fams["shoal_alerts_undelivered"].samples[0].value == 3
        inputs = {s.labels["outcome"]: s.value for s in fams["shoal_inputs"].samples}
        assert inputs == {"committed": 2, "duplicate": 0, "quarantined": 1}
        invalid = fams["shoal_rows_invalid"].samples[0].value
        assert invalid == 1
        with pytest.raises(Exception, match="readonly|read-only|query_only"):
            reader.db.execute("DELETE FROM ledger")
    finally:
        reader.close()
        store.close()


def test_since_accepts_durations_and_iso_times():
    from shoal.daemon.errors import UsageError
    from shoal.daemon.views.report import parse_since

    assert parse_since("2h", now=10_000.0) == 10_000.0 - 7200
    assert parse_since("30min", now=10_000.0) == 10_000.0 - 1800
    assert parse_since("1970-01-01T01:00") == 3600.0          # no zone: UTC
    assert parse_since("1970-01-01T01:00+01:00") == 0.0
    with pytest.raises(UsageError, match="--since"):
        parse_since("last tuesday")


def test_example_systemd_unit(tmp_path):
    import configparser
    import shutil
    import subprocess
    import sys
    from pathlib import Path

    from shoal.daemon.cli.main import build_parser

    text = (Path(__file__).parents[2] / "config" / "systemd" / "shoal.service").read_text()
    unit = configparser.ConfigParser(strict=False, interpolation=None, delimiters=("=",))
    unit.optionxform = str
    unit.read_string(text)
    svc = unit["Service"]
    assert svc["Type"] == "notify" and svc["Restart"] == "on-failure"
    assert svc["WatchdogSec"] and svc["User"] == "shoal" and svc["NoNewPrivileges"] == "yes"
    assert svc["ProtectSystem"] == "strict" and "-HUP" in svc["ExecReload"]
    exe, *args = svc["ExecStart"].split()
    parsed = build_parser().parse_args(args)          # the command line shoal accepts
    assert parsed.command == "watch" and parsed.config == "/etc/shoal/shoal.yaml"
    analyze = shutil.which("systemd-analyze")
    if analyze is None:
        return  # systemd's own check is extra; the fields above are checked everywhere
    shoal = Path(sys.executable).with_name("shoal")
    copy = tmp_path / "shoal.service"
    copy.write_text(text.replace(exe, str(shoal)))
    done = subprocess.run([analyze, "verify", str(copy)], capture_output=True, text=True,
                          timeout=60)
    assert done.returncode == 0 and done.stderr.strip() == "", done.stderr
