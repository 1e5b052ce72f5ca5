"""``shoal status`` tells a running service from a stopped one (the state folder's lock
and its pid), when it last made progress, and the last worker failure."""
import json
import os

import pytest

from shoal.daemon.runtime import liveness
from shoal.daemon.cli.main import main, open_service_parts
from drills import synthetic_table, write_config, write_drop
from shoal.daemon.files.layout import StateLock
from shoal.daemon.runtime.supervise import Supervisor


@pytest.fixture()
def config(tmp_path):
    cfg = write_config(tmp_path)
    (tmp_path / "inbox").mkdir()
    write_drop(synthetic_table(0, 800, seed=3), tmp_path / "inbox", "first.csv", index=0)
    assert main(["ingest", "-c", str(cfg), str(tmp_path / "inbox" / "first.csv")]) == 0
    return cfg


def _status(cfg, capsys) -> tuple[str, dict]:
    capsys.readouterr()
    assert main(["status", "-c", str(cfg)]) == 0
    text = capsys.readouterr().out
    assert main(["status", "-c", str(cfg), "--json"]) == 0
    return text, json.loads(capsys.readouterr().out)


def test_stopped_service_is_not_running(config, capsys):
    text, snap = _status(config, capsys)
    assert text.splitlines()[0] == "service: not running"
    assert snap["service"]["running"] is False and snap["service"]["pid"] is None


@pytest.mark.parametrize("via", ["proc_locks", "try_lock"])
def test_a_held_lock_is_a_running_service_with_its_pid(config, capsys, monkeypatch, via):
    if via == "try_lock":   # where /proc/locks is not available
        monkeypatch.setattr(liveness, "_proc_locks_holder", lambda path: None)
    elif not os.path.exists("/proc/locks"):
        pytest.skip("no /proc/locks on this system")
    lock = StateLock(config.parent / "state" / "lock").acquire()
    try:
        text, snap = _status(config, capsys)
    finally:
        lock.release()
    assert text.splitlines()[0].startswith(f"service: running, pid {os.getpid()}")
    assert snap["service"]["running"] is True and snap["service"]["pid"] == os.getpid()
    text, _ = _status(config, capsys)            # released: not running again
    assert text.splitlines()[0] == "service: not running"


def test_a_worker_failure_is_shown_after_the_service_died(config, capsys):
    from shoal.config import load_config

    settings = load_config(config)
    with open_service_parts(settings) as (layout, store, pipeline):
        supervisor = Supervisor(settings, layout, pipeline)

        def crash():
            pipeline.stop.is_set()          # one heartbeat: the worker made progress
            raise RuntimeError("injected fault in the worker")

        supervisor.service.run = crash
        with pytest.raises(RuntimeError, match="injected"):
            supervisor.run()
        record = liveness.read_liveness(layout.state)
        assert record["pid"] == os.getpid() and record["last_progress"] is not None
    text, snap = _status(config, capsys)
    lines = text.splitlines()
    assert lines[0].startswith(f"service: not running (last run pid {os.getpid()}, ended ")
    assert any(line.startswith("last worker failure: RuntimeError: injected fault in the "
                               f"worker (pid {os.getpid()}") for line in lines), text
    assert snap["service"]["last_failure"]["detail"] == \
        "RuntimeError: injected fault in the worker"
