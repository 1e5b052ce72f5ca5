"""Readiness gate (injected clocks), safe output names, atomic writes."""
import os
import stat
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from shoal.daemon.gate import ReadinessGate, Verdict, input_kind
from shoal.daemon.writer import atomic_file, labels_name, labels_table, safe_stem


class Clock:
    def __init__(self, t=1000.0):
        self.t = t

    def __call__(self):
        return self.t


def _gate(settle=1.0):
    mono, wall = Clock(), Clock(0.0)
    gate = ReadinessGate(settle, ["*.tmp", ".*"], clock=mono, wall=wall)
    return gate, mono, wall


def test_file_written_in_place_is_ready_only_after_settling(tmp_path):
    gate, mono, wall = _gate()
    p = tmp_path / "a.csv"
    p.write_text("x\n1\n")
    wall.t = os.stat(p).st_mtime_ns / 1e9       # "now" = just written
    d = gate.check(p)
    assert d.verdict is Verdict.WAIT and d.recheck_at == pytest.approx(mono.t + 1.0)
    mono.t += 0.6
    wall.t += 0.6
    with open(p, "a") as f:                       # still being written
        f.write("2\n")
    wall.t = os.stat(p).st_mtime_ns / 1e9
    assert gate.check(p).verdict is Verdict.WAIT
    mono.t += 0.9
    wall.t += 0.9
    assert gate.check(p).verdict is Verdict.WAIT  # unchanged for only 0.9 s
    mono.t += 0.2
    wall.t += 0.2
    assert gate.check(p).verdict is Verdict.READY


def test_renamed_in_file_is_ready_at_once(tmp_path):
    gate, mono, wall = _gate(settle=30.0)
    p = tmp_path / "a.csv"
    p.write_text("x\n1\n")
    wall.t = os.stat(p).st_mtime_ns / 1e9
    gate.note_renamed(p)
    d = gate.check(p)
    assert d.verdict is Verdict.READY and d.reason == "renamed in"


def test_change_time_after_last_write_marks_a_move_from_outside(tmp_path):
    gate, mono, wall = _gate(settle=30.0)
    staging = tmp_path / "staging"
    staging.mkdir()
    (staging / "a.csv").write_text("x\n1\n")
    time.sleep(0.05)  # past the kernel's timestamp tick, so the rename gets a later ctime
    os.rename(staging / "a.csv", tmp_path / "a.csv")  # ctime moves on, mtime does not
    st = os.stat(tmp_path / "a.csv")
    wall.t = st.st_mtime_ns / 1e9
    if st.st_ctime_ns == st.st_mtime_ns:
        pytest.skip("this filesystem does not update the change time on rename")
    assert gate.check(tmp_path / "a.csv").verdict is Verdict.READY


def test_parquet_waits_for_its_footer_until_settled(tmp_path):
    gate, mono, wall = _gate(settle=5.0)
    p = tmp_path / "a.parquet"
    pq.write_table(pa.table({"x": [1.0, 2.0]}), p)
    data = p.read_bytes()
    p.write_bytes(data[:-6])                     # footer not written yet
    wall.t = os.stat(p).st_mtime_ns / 1e9
    gate.note_renamed(p)
    assert gate.check(p).verdict is Verdict.WAIT
    mono.t += 6
    wall.t += 6
    assert gate.check(p).verdict is Verdict.READY  # settled: the reader will quarantine it


def test_ignored_refused_and_gone(tmp_path):
    gate, _, _ = _gate()
    (tmp_path / "x.csv.tmp").write_text("a")
    (tmp_path / ".hidden.csv").write_text("a")
    (tmp_path / "target.csv").write_text("a")
    os.symlink(tmp_path / "target.csv", tmp_path / "link.csv")
    os.mkfifo(tmp_path / "pipe.csv")
    (tmp_path / "folder.csv").mkdir()
    assert gate.check(tmp_path / "x.csv.tmp").verdict is Verdict.IGNORE
    assert gate.check(tmp_path / ".hidden.csv").verdict is Verdict.IGNORE
    for name, kind in (("link.csv", "symlink"), ("pipe.csv", "fifo"), ("folder.csv", "folder")):
        d = gate.check(tmp_path / name)
        assert d.verdict is Verdict.REFUSE and kind in d.reason
    assert gate.check(tmp_path / "nothing.csv").verdict is Verdict.GONE


def test_input_kinds():
    assert input_kind("a.CSV") == "csv" and input_kind("a.csv.gz") == "csv.gz"
    assert input_kind("a.parquet") == input_kind("b.pq") == "parquet"
    assert input_kind("a.json") is None and input_kind(".csv") is None


@pytest.mark.parametrize("name", ["../../etc/passwd.csv", "..", "a b/../c d.csv", "çà ñ 温度.csv",
                                  "...csv", "/abs/path.parquet", "x" * 500 + ".csv",
                                  "a\\..\\b.csv", ".hidden.csv"])
def test_labels_names_stay_in_the_outbox(tmp_path, name):
    out = labels_name(name, "0123456789abcdef" * 4, "parquet")
    assert "/" not in out and "\\" not in out and not out.startswith(".")
    assert ".." not in out.replace(".labels.", "")
    assert (tmp_path / out).resolve().parent == tmp_path.resolve()
    assert len(out) < 120
    assert safe_stem("daily sales.csv") == "daily_sales"


def test_atomic_write_mode_and_cleanup(tmp_path):
    target = tmp_path / "out.bin"
    with atomic_file(target) as f:
        f.write(b"hello")
    assert target.read_bytes() == b"hello"
    assert stat.S_IMODE(os.stat(target).st_mode) == 0o640
    with pytest.raises(RuntimeError):
        with atomic_file(target) as f:
            f.write(b"half")
            raise RuntimeError("disk on fire")
    assert target.read_bytes() == b"hello"          # the old content stands
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.bin"]  # no temp left


def test_labels_table_nulls_invalid_rows():
    valid = np.array([True, False, True])
    t = labels_table(pa.table({"key": ["a", "b", "c"]}), valid, np.array([3, 5]),
                     np.array([0.9, 0.6]), np.array([-1.0, -9.0]), -5.0, 7)
    assert t.column_names == ["key", "segment", "confidence", "log_density", "unusual",
                              "model_version"]
    assert t.column("segment").to_pylist() == [3, None, 5]
    assert t.column("unusual").to_pylist() == [False, None, True]
    assert t.column("model_version").to_pylist() == [7, None, 7]
    warm = labels_table(pa.table({"key": ["a"]}), np.array([True]), None, None, None, -5.0, None)
    assert warm.column("segment").null_count == 1
