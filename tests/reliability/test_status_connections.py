"""Idle connections to the status port cannot use up the service's file descriptors."""
import json
import os
import resource
import socket
import subprocess
import sys
import time
import urllib.request

import pyarrow.parquet as pq
import pytest

from drills import ledger_counts, synthetic_table, wait_until, write_config, \
    write_drop

SEED = 17
IDLE = 2000
SERVICE_FILES = 1024   # the service's descriptor limit: systemd's default soft limit


def _limit_files():
    resource.setrlimit(resource.RLIMIT_NOFILE, (SERVICE_FILES, SERVICE_FILES))


def _port(log, proc):
    def started():
        assert proc.poll() is None, log.read_text()
        return any('"http_started"' in line for line in log.read_text().splitlines())

    wait_until(started, 60, "the status endpoint")
    for line in log.read_text().splitlines():
        if '"http_started"' in line:
            return json.loads(line)["port"]


def test_two_thousand_idle_connections_leave_healthz_answering_and_inputs_flowing(tmp_path):
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    need = IDLE + 256                      # the test's own sockets, and some to spare
    if hard != resource.RLIM_INFINITY and hard < need:
        pytest.skip(f"the hard limit of open files ({hard}) is below {need}")
    resource.setrlimit(resource.RLIMIT_NOFILE, (max(soft, need), hard))
    cfg = write_config(tmp_path, http={"port": 0},
                       watch={"settle_seconds": 0.1, "rescan_seconds": 0.2})
    log = tmp_path / "watch.log"
    idle: list[socket.socket] = []
    with open(log, "ab") as err:
        proc = subprocess.Popen([sys.executable, "-m", "shoal.daemon.cli.main", "watch", "-c",
                                 str(cfg)], stdout=subprocess.DEVNULL, stderr=err,
                                stdin=subprocess.DEVNULL, preexec_fn=_limit_files)
    try:
        port = _port(log, proc)
        held = []
        for i in range(IDLE):              # connect, send nothing, keep it open
            s = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
            s.setblocking(False)           # not held back by a full listen queue: the
            s.connect_ex(("127.0.0.1", port))   # kernel retries a dropped SYN itself
            idle.append(s)
            time.sleep(0.001)              # a steady stream, as a flood of clients makes
            if i % 100 == 99:              # the service's descriptors, as the flood goes on
                held.append(len(os.listdir(f"/proc/{proc.pid}/fd")))
                assert held[-1] < 256, held
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/healthz", timeout=10) as r:
            assert r.status == 200
        # connections are accepted in order: all were taken before /healthz, and the
        # service closed all but the newest it keeps open (http.max_connections: 64)
        closed = set()

        def closed_by_service():
            for i, s in enumerate(idle):
                if i not in closed:
                    try:
                        if s.recv(1) == b"":
                            closed.add(i)
                    except ConnectionResetError:   # reset by the service: closed too
                        closed.add(i)
                    except OSError:       # nothing to read yet, or still connecting
                        pass
            return len(closed) >= IDLE - 64

        wait_until(closed_by_service, 30, "the service to close the oldest idle connections")
        assert len(os.listdir(f"/proc/{proc.pid}/fd")) < 256
        write_drop(synthetic_table(0, 700, SEED), tmp_path / "inbox", "a.parquet")
        wait_until(lambda: ledger_counts(tmp_path / "state" / "state.db").get("committed") == 1,
                   60, "the input to be committed")
        assert len(os.listdir(f"/proc/{proc.pid}/fd")) < 256
        assert proc.poll() is None
        assert pq.read_table(next((tmp_path / "outbox").glob("*.labels.parquet"))).num_rows \
            == 700
    finally:
        for s in idle:
            s.close()
        proc.terminate()
        proc.wait(timeout=30)
        resource.setrlimit(resource.RLIMIT_NOFILE, (soft, hard))
    assert proc.returncode == 0, log.read_text()[-2000:]
