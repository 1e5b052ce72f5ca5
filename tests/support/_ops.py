"""Helpers of the operating tests: a real `shoal watch` process with its own environment,
demo drops, and its JSON log."""
import json
import os
import subprocess
import sys
import urllib.error
import urllib.request
from pathlib import Path

import pyarrow as pa

from drills import wait_until, write_config, write_drop


def demo_config(folder: Path, **overrides) -> Path:
    from shoal.daemon.demo.scenario import FEATURES

    return write_config(folder, features=list(FEATURES), passthrough=["unit_id", "timestamp"],
                        segments=4, warmup_rows=2000, learning={"n_init": 2}, **overrides)


def demo_drops(inbox: Path, n: int, rows: int, seed: int = 7, start: int = 0):
    """Write ``n`` drops of the warehouse scenario (seeded, invented data) into ``inbox``."""
    from shoal.daemon.demo.scenario import drops

    names = []
    for i, columns in enumerate(drops(start + n, rows, seed=seed)):
        if i < start:
            continue
        columns.pop("state")
        name = f"fleet-{i:03d}." + ("parquet" if i % 2 else "csv")
        write_drop(pa.table(columns), inbox, name, index=i)
        names.append(name)
    return names


class Watch:
    """`python -m shoal.daemon.cli.main watch -c CONFIG`, stderr (JSON log) to a file."""

    def __init__(self, config: Path, log: Path, env: dict | None = None):
        self.log = Path(log)
        with open(self.log, "ab") as err:
            self.proc = subprocess.Popen(
                [sys.executable, "-m", "shoal.daemon.cli.main", "watch", "-c", str(config)],
                stdout=subprocess.DEVNULL, stderr=err, stdin=subprocess.DEVNULL,
                env={**os.environ, **(env or {})})

    def events(self, name: str | None = None) -> list[dict]:
        out = []
        for line in self.log.read_text("utf-8", "replace").splitlines():
            if line.startswith("{"):
                try:
                    e = json.loads(line)
                except json.JSONDecodeError:
                    continue
                if name is None or e.get("event") == name:
                    out.append(e)
        return out

    def wait_event(self, name: str, timeout: float, count: int = 1) -> dict:
        wait_until(lambda: len(self.events(name)) >= count or self.proc.poll() is not None,
                   timeout, f"{count} {name!r} events in {self.log}", interval=0.05)
        got = self.events(name)
        assert len(got) >= count, (f"the service exited ({self.proc.poll()}) before "
                                   f"{name!r}:\n{self.log.read_text()[-3000:]}")
        return got[count - 1]

    def stop(self, timeout: float = 20.0) -> int:
        if self.proc.poll() is None:
            self.proc.terminate()
        try:
            return self.proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout=10)
            raise

    def kill(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(timeout=10)


def get(url: str, timeout: float = 30.0, method: str = "GET") -> tuple[int, dict, bytes]:
    """(status, headers, body) of one request; HTTP errors are returned, not raised."""
    req = urllib.request.Request(url, method=method, data=b"" if method == "POST" else None)
    try:
        with urllib.request.urlopen(req, timeout=timeout) as resp:
            return resp.status, dict(resp.headers), resp.read()
    except urllib.error.HTTPError as exc:
        return exc.code, dict(exc.headers), exc.read()


def notify_socket(folder: Path, kind: str):
    """A bound datagram socket standing in for the service manager: (socket, NOTIFY_SOCKET)."""
    import socket
    import uuid

    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    if kind == "abstract":
        name = f"@shoal-test-{os.getpid()}-{uuid.uuid4().hex[:8]}"
        sock.bind(b"\0" + name[1:].encode())
    else:
        name = str(folder / "notify.sock")
        sock.bind(name)
    return sock, name


def parquet_drops(folder: Path, first: int, n: int, seed: int, rows: int = 400) -> list[Path]:
    """Synthetic drops ``d<first>.parquet`` .. written into ``folder`` (not an inbox)."""
    import pyarrow.parquet as pq

    from drills import synthetic_table

    paths = []
    for i in range(first, first + n):
        path = folder / f"d{i:03d}.parquet"
        pq.write_table(synthetic_table(i, rows, seed), path)
        paths.append(path)
    return paths
