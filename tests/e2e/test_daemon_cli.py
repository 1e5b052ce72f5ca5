"""The command line as a user runs it (subprocesses): exit codes and messages."""
import json
import os
import subprocess
import sys

import pyarrow.parquet as pq
import pytest

from drills import synthetic_table, write_config, write_drop

SEED = 5


def shoal(*args, timeout=120):
    return subprocess.run([sys.executable, "-m", "shoal.daemon.cli.main", *map(str, args)],
                          capture_output=True, text=True, timeout=timeout)


def test_help_and_version():
    r = shoal("--help")
    assert r.returncode == 0
    for cmd in ("watch", "ingest", "label", "segments", "config", "demo"):
        assert cmd in r.stdout
    r = shoal("--version")
    assert r.returncode == 0 and r.stdout.startswith("shoal ")
    r = shoal("ingest")                       # no config, no files
    assert r.returncode == 2 and "required" in r.stderr


@pytest.mark.parametrize("text, needle", [
    ("features: [a]\nwarmup_row: 100\n", "warmup_row: unknown setting"),
    ("features: [a]\nwarmup_rows: lots\n", "warmup_rows: expected an integer"),
    ("segments: 3\n", "features: required"),
    ("features: [a]\ncovariance: banana\n", "covariance: expected one of"),
])
def test_config_errors_exit_2_naming_the_problem(tmp_path, text, needle):
    cfg = tmp_path / "c.yaml"
    cfg.write_text(text)
    r = shoal("watch", "-c", cfg)
    assert r.returncode == 2, r.stderr
    assert needle in r.stderr, r.stderr


def test_folder_not_writable_exits_2(tmp_path):
    ro = tmp_path / "ro"
    ro.mkdir()
    if os.geteuid() == 0:   # root writes through mode bits; the immutable flag stops it
        made = subprocess.run(["chattr", "+i", str(ro)], capture_output=True)
        if made.returncode != 0:
            pytest.skip(f"cannot make a read-only folder as root: {made.stderr!r}")
    else:
        ro.chmod(0o500)
    try:
        cfg = write_config(tmp_path, outbox="ro")
        r = shoal("watch", "-c", cfg)
    finally:
        if os.geteuid() == 0:
            subprocess.run(["chattr", "-i", str(ro)], check=True)
        else:
            ro.chmod(0o700)
    assert r.returncode == 2, r.stderr
    assert "outbox: expected a writable folder" in r.stderr and str(ro) in r.stderr


def test_folder_not_usable_exits_2(tmp_path):
    # as root every folder is writable; a path through a regular file is not a folder
    (tmp_path / "blocker").write_text("a file, not a folder")
    cfg = write_config(tmp_path, state="blocker/state")
    r = shoal("watch", "-c", cfg)
    assert r.returncode == 2, r.stderr
    assert "state: expected a folder that exists or can be created" in r.stderr


def test_config_prints_the_effective_config(tmp_path):
    cfg = write_config(tmp_path)
    r = shoal("config", "-c", cfg)
    assert r.returncode == 0
    assert "valid" in r.stdout and "settle_seconds: 0.5" in r.stdout
    assert f"inbox: {tmp_path / 'inbox'}" in r.stdout
    # an error in the config: exit 2, the key named, nothing printed as valid
    bad = write_config(tmp_path / "bad", drift={"persist": 0})
    r = shoal("config", "-c", bad)
    assert r.returncode == 2 and "drift.persist" in r.stderr and r.stdout == ""
    # the command has one name: the earlier one is not a command any more
    r = shoal("check" + "-config", "-c", cfg)
    assert r.returncode == 2 and "invalid choice" in r.stderr


def test_ingest_label_segments(tmp_path):
    cfg = write_config(tmp_path, warmup_rows=300)
    files = tmp_path / "files"
    files.mkdir()
    good = [write_drop(synthetic_table(i, 400, SEED), files, f"g{i}.csv") for i in range(3)]
    r = shoal("ingest", "-c", cfg, *good)
    assert r.returncode == 0, r.stderr
    assert "3 of 3 inputs committed" in r.stdout
    assert all(p.exists() for p in good)          # files outside the inbox stay put
    assert os.stat(tmp_path / "state").st_mode & 0o777 == 0o700
    assert {p.stat().st_mode & 0o777 for p in (tmp_path / "outbox").iterdir()} == {0o640}
    logs = [json.loads(line) for line in r.stderr.splitlines()]
    committed = [e for e in logs if e["event"] == "input_committed"]
    assert [e["model_version"] for e in committed] == [1, 2, 3]
    assert all({"time", "level", "file", "rows", "duration"} <= set(e) for e in committed)

    bad = files / "bad.csv"
    bad.write_text("key,ts,f1,f2\nk,1,2,3\n")
    r = shoal("ingest", "-c", cfg, good[0], bad)
    assert r.returncode == 1
    assert "already_done" in r.stdout and "missing_column" in r.stdout
    assert (tmp_path / "state" / "quarantine" / "bad.csv.json").exists()
    assert bad.exists()

    r = shoal("segments", "-c", cfg, "--json")
    assert r.returncode == 0, r.stderr
    summary = json.loads(r.stdout)
    assert summary["model_version"] == 3 and len(summary["segments"]) == 3
    s0 = summary["segments"][0]
    assert {"id", "weight", "rows", "mean", "spread", "age_versions"} <= set(s0)
    assert set(s0["mean"]) == {"f1", "f2", "f3"}
    assert sum(s["rows"] for s in summary["segments"]) == 400 * 3
    r = shoal("segments", "-c", cfg)
    assert r.returncode == 0 and "f1 (mean±sd)" in r.stdout

    out = tmp_path / "probe-labels.parquet"
    r = shoal("label", "-c", cfg, good[1], "--out", out)
    assert r.returncode == 0, r.stderr
    t = pq.read_table(out)
    assert t.num_rows == 400 and t.column("model_version").to_pylist() == [3] * 400
    assert pq.read_schema(out).metadata[b"shoal.model_version"] == b"3"
    r = shoal("ingest", "-c", cfg, tmp_path / "missing.csv")
    assert r.returncode == 2 and "no such file" in r.stderr


def test_a_second_process_on_the_same_state_is_refused(tmp_path):
    from shoal.daemon.files.layout import StateLock, prepare_folders
    from shoal.config import load_config

    cfg = write_config(tmp_path)
    layout = prepare_folders(load_config(cfg))
    with StateLock(layout.lock):
        (tmp_path / "x.csv").write_text("key,ts,f1,f2,f3\n")
        r = shoal("ingest", "-c", cfg, tmp_path / "x.csv")
    assert r.returncode == 3 and "in use by another shoal process" in r.stderr


def test_demo_runs_end_to_end(tmp_path):
    r = shoal("demo", "--dir", tmp_path / "demo", "--drops", "6", timeout=300)
    assert r.returncode == 0, r.stderr
    assert "processed: {'committed': 6}" in r.stdout
    assert "nearest true state" in r.stdout and "labels files:" in r.stdout
    assert len(list((tmp_path / "demo" / "outbox").iterdir())) == 6
    (tmp_path / "other").mkdir()
    (tmp_path / "other" / "precious.txt").write_text("keep me")
    r = shoal("demo", "--dir", tmp_path / "other", "--drops", "2")
    assert r.returncode == 2 and "not empty" in r.stderr
    assert (tmp_path / "other" / "precious.txt").exists()
