"""Readiness gate (injected clocks), safe output names, atomic writes."""
import os
import stat
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from shoal.daemon.intake.gate import ReadinessGate, Verdict, input_kind
from shoal.daemon.files.writer import atomic_file, labels_name, labels_table, safe_stem


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


def test_parquet_without_its_footer_waits_as_incomplete_then_is_passed_on(tmp_path):
    mono, wall = Clock(), Clock(0.0)
    gate = ReadinessGate(5.0, incomplete_seconds=60.0, clock=mono, wall=wall)
    p = tmp_path / "a.parquet"
    pq.write_table(pa.table({"x": [1.0, 2.0]}), p)
    data = p.read_bytes()
    p.write_bytes(data[:-6])                     # footer not written yet
    wall.t = os.stat(p).st_mtime_ns / 1e9
    gate.note_renamed(p)
    assert gate.check(p).verdict is Verdict.WAIT
    mono.t += 6
    wall.t += 6
    d = gate.check(p)                            # settled, still no footer: incomplete
    assert d.verdict is Verdict.WAIT and d.incomplete, d
    mono.t += 55
    wall.t += 55
    assert gate.check(p).verdict is Verdict.READY  # given up: the reader quarantines it
    q = tmp_path / "b.parquet"
    q.write_bytes(data[:-6])
    wall.t = os.stat(q).st_mtime_ns / 1e9 + 30   # paused past the settle time
    assert gate.check(q).verdict is Verdict.WAIT
    q.write_bytes(data)                          # the writer finished it
    mono.t += 100
    wall.t = os.stat(q).st_mtime_ns / 1e9 + 6
    assert gate.check(q).verdict is Verdict.READY
    r = tmp_path / "not-parquet.parquet"         # no leading magic: no Parquet being written
    r.write_bytes(b"key,ts\n1,2\n")
    wall.t = os.stat(r).st_mtime_ns / 1e9 + 6
    assert gate.check(r).verdict is Verdict.READY  # settled: the reader refuses it at once


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


@pytest.mark.parametrize("invalid", ["none", "some", "all"])
def test_labels_table_columns_equal_pyarrow_arrays_of_the_same_values(invalid):
    """Columns made from numpy buffers equal ``pa.array(values, mask=...)`` of the same
    values (the form they replaced); 70 rows: bitmaps of several bytes, a partial last."""
    rng = np.random.default_rng(5)
    n = 70
    valid = {"none": np.ones(n, bool), "some": rng.uniform(size=n) < 0.7,
             "all": np.zeros(n, bool)}[invalid]
    m = int(valid.sum())
    seg, conf, ld = rng.integers(0, 9, m), rng.uniform(0.3, 1.0, m), rng.normal(-5, 2, m)
    t = labels_table(pa.table({"key": np.arange(n)}), valid, seg, conf, ld, -5.0, 4)

    def expected(values, dtype, arrow_type):
        full = np.zeros(n, dtype)
        full[valid] = values
        return pa.array(full, arrow_type, mask=~valid)

    ld_full = np.zeros(n)
    ld_full[valid] = ld
    assert t.column("segment").combine_chunks().equals(expected(seg, np.int64, pa.int64()))
    assert t.column("confidence").combine_chunks().equals(
        expected(conf, np.float64, pa.float64()))
    assert t.column("log_density").combine_chunks().equals(
        expected(ld, np.float64, pa.float64()))
    assert t.column("unusual").combine_chunks().equals(
        pa.array(ld_full < -5.0, pa.bool_(), mask=~valid))
    assert t.column("model_version").to_pylist() == [4 if v else None for v in valid]
    for name in ("segment", "confidence", "unusual"):
        assert t.column(name).null_count == n - m
    t.validate(full=True)


def _labels_tables(n_tables=3, rows=50):
    rng = np.random.default_rng(11)
    out = []
    for i in range(n_tables):
        valid = rng.uniform(size=rows) < 0.8
        m = int(valid.sum())
        passthrough = pa.table({
            "key": pa.array([f"k{j % 7}" for j in range(rows)]),
            "id": pa.array(np.arange(i * rows, (i + 1) * rows)),
            "ts": pa.array(np.arange(rows) * 1000 + i, pa.timestamp("ms", tz="UTC"))})
        out.append(labels_table(passthrough, valid, rng.integers(0, 4, m),
                                rng.uniform(0.5, 1, m), rng.normal(size=m), -1.0, 3))
    return out


@pytest.mark.parametrize("ready_after", [None, 0, 2, 99])
def test_labels_metadata_asked_late_gives_the_same_file(tmp_path, ready_after):
    """Whether the metadata is asked as the first table is written (``ready`` None), after
    a later one, or only once the last is written, it is asked exactly once and the
    Parquet file is the same, byte for byte."""
    from shoal.daemon.files.writer import write_labels_stream

    tables = _labels_tables()
    meta = {"input_digest": "ab" * 32, "digest_algorithm": "blake3", "input_name": "in.parquet",
            "model_version": 3}
    reference = write_labels_stream(iter(tables), tmp_path / "ref.parquet", "parquet",
                                    lambda: meta, threaded=False)
    written, asked = [], []

    def metadata():
        asked.append(len(written))
        return meta

    def counted():
        for t in tables:
            written.append(t)
            yield t

    ready = None if ready_after is None else (lambda: len(written) > ready_after)
    out = write_labels_stream(counted(), tmp_path / "late.parquet", "parquet", metadata,
                              threaded=False, ready=ready)
    assert asked == [{None: 1, 0: 1, 2: 3, 99: 3}[ready_after]]
    assert out.read_bytes() == reference.read_bytes()
    assert pq.read_schema(out).metadata[b"shoal.input_digest"] == b"ab" * 32
    assert pq.read_table(out).equals(pa.concat_tables(tables).replace_schema_metadata(
        pq.read_table(out).schema.metadata))


def test_labels_metadata_refusing_part_way_leaves_no_file(tmp_path):
    """An error from the metadata (a duplicate found once the hash is known) raised after
    some tables were written leaves no labels file and no temp file behind."""
    from shoal.daemon.files.writer import write_labels_stream

    tables = _labels_tables(4)
    written = []

    def counted():
        for t in tables:
            written.append(t)
            yield t

    def refuse():
        raise LookupError("seen before")

    with pytest.raises(LookupError):
        write_labels_stream(counted(), tmp_path / "x.parquet", "parquet", refuse,
                            threaded=False, ready=lambda: len(written) >= 2)
    assert len(written) == 2
    assert list(tmp_path.iterdir()) == []


def test_labels_parquet_encodings_per_column_and_the_values_read_back(tmp_path):
    """Integer and time pass-through columns are delta-encoded, the labels columns with few
    values dictionary-encoded (Parquet has no dictionary for booleans: ``unusual`` stays
    bit-packed), the float labels plain; every value reads back (pyarrow's
    own reader as the reference) whatever the encoding."""
    from shoal.daemon.files.writer import write_labels_stream

    tables = _labels_tables(3)
    out = write_labels_stream(iter(tables), tmp_path / "enc.parquet", "parquet",
                              lambda: {"model_version": 3}, threaded=False)
    meta = pq.ParquetFile(out).metadata
    for g in range(meta.num_row_groups):
        enc = {meta.row_group(g).column(i).path_in_schema:
               set(meta.row_group(g).column(i).encodings) for i in range(meta.num_columns)}
        assert "DELTA_BINARY_PACKED" in enc["id"] and "DELTA_BINARY_PACKED" in enc["ts"]
        for name in ("segment", "model_version"):
            assert "RLE_DICTIONARY" in enc[name], name
        for name in ("confidence", "log_density"):
            assert enc[name] & {"RLE_DICTIONARY", "DELTA_BINARY_PACKED"} == set(), name
    back = pq.read_table(out)
    assert back.equals(pa.concat_tables(tables).replace_schema_metadata(back.schema.metadata))
