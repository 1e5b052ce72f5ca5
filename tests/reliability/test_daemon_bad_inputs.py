"""Bad inputs are quarantined (or refused) and the service goes on.

One in-process service (worker thread + watchdog observer) takes every kind of
bad input in turn; a good drop after each shows it still runs, and the outbox
only ever holds complete labels files of committed inputs.
"""
import gzip
import json
import os
from pathlib import Path

import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

from drills import InProcessService, synthetic_table, wait_until

SEED = 3


class Running(InProcessService):
    def good(self, i):
        r = self.drop(synthetic_table(i, 300, SEED), f"good-{i}.csv")
        assert r.outcome == "committed", r
        return r


def _csv(table):
    sink = pa.BufferOutputStream()
    pacsv.write_csv(table, sink)
    return sink.getvalue().to_pybytes()


@pytest.fixture
def svc(tmp_path):
    with Running(tmp_path, warmup_rows=500,
                 limits={"max_file_bytes": 400_000, "max_rows": 2000, "max_columns": 12},
                 watch={"incomplete_seconds": 1.0}) as s:
        r = s.drop(synthetic_table(0, 700, SEED), "seed.parquet")
        assert r.outcome == "committed" and r.model_version == 1
        yield s


BAD = {
    "empty.csv": (b"", "empty", ""),
    "header-only.csv": (b"key,ts,f1,f2,f3\n", "no_rows", ""),
    "missing-col.csv": (b"key,ts,f1,f2\nk,1,0.5,0.5\n", "missing_column", "'f3'"),
    "text.csv": (b"key,ts,f1,f2,f3\nk,1,0.5,0.5,1\nk,2,0.5,warm,1\n", "non_numeric_feature",
                 "line 3, column 'f2'"),
    "wide.csv": (b"key,ts,f1,f2,f3\nk,1,0.5,0.5,1\nk,2,0.5,0.5,1\nk,3,1,2,3,4\n", "bad_row",
                 "line 4: expected 5 fields, found 6"),
    "latin1.csv": (b"key,ts,f1,f2,f3\nk\xe9\xff,1,0.5,0.5,1\n", "encoding", "line 2"),
    "latin1-header.csv": (b"k\xe9y,ts,f1,f2,f3\nk,1,0.5,0.5,1\n", "encoding", "line 1"),
    "not-gzip.csv.gz": (b"key,ts,f1,f2,f3\n", "bad_compression", ""),
    "notes.txt": (b"hello", "unsupported_type", ""),
}


def test_bad_csv_like_inputs_are_quarantined(svc):
    for i, (name, (data, reason, detail)) in enumerate(sorted(BAD.items())):
        r = svc.drop_bytes(data, name)
        assert r.outcome == "quarantined" and r.reason == reason, r
        side = svc.sidecar(name)
        assert side["reason"] == reason and detail in side["detail"] and side["time"], side
        assert (svc.layout.quarantine / name).exists() and not (svc.layout.inbox / name).exists()
        svc.good(100 + i)  # the service goes on
        _outbox_is_clean(svc, expect=2 + i)


def test_truncated_and_string_parquet(svc):
    sink = pa.BufferOutputStream()
    pq.write_table(synthetic_table(5, 100, SEED), sink)
    data = sink.getvalue().to_pybytes()
    r = svc.drop_bytes(data[: len(data) // 2], "cut.parquet")
    assert (r.outcome, r.reason) == ("quarantined", "truncated_parquet")
    t = synthetic_table(6, 50, SEED)
    t = t.set_column(2, "f1", pa.array([str(v) for v in t.column("f1").to_pylist()]))
    r = svc.drop(t, "strings.parquet")
    assert (r.outcome, r.reason) == ("quarantined", "non_numeric_feature")
    assert "'f1' has type string" in svc.sidecar("strings.parquet")["detail"]
    svc.good(2)
    _outbox_is_clean(svc, expect=2)


def test_parquet_without_a_passthrough_column_is_quarantined(svc):
    # Found by the deep Parquet fuzz run: pyarrow's read_dictionary raised KeyError out
    # of the pipeline for a passthrough column the file does not have.
    r = svc.drop(synthetic_table(7, 50, SEED).drop_columns(["key"]), "no-key.parquet")
    assert (r.outcome, r.reason) == ("quarantined", "missing_column"), r
    assert "'key'" in svc.sidecar("no-key.parquet")["detail"]
    svc.good(3)
    _outbox_is_clean(svc, expect=2)


def test_non_finite_cells_are_null_labelled_and_file_committed(svc):
    # NaN and empty cells are missing values: those rows (2 of 3 features present, the
    # default min_observed) are scored and learned; infinite cells make a row invalid
    data = (b"key,ts,f1,f2,f3\na,1,0.1,0.2,0.3\nb,2,nan,0.2,0.3\nc,3,inf,0.2,0.3\n"
            b"d,4,,0.2,0.3\ne,5,-inf,0.2,0.3\nf,6,6.0,0.1,1.0\ng,7,,,0.3\n")
    r = svc.drop_bytes(gzip.compress(data), "holes.csv.gz")
    assert r.outcome == "committed" and r.rows == 7 and r.rows_invalid == 3
    labels = pq.read_table(r.labels)
    assert labels.column("key").to_pylist() == list("abcdefg")
    seg = labels.column("segment").to_pylist()
    assert [s is None for s in seg] == [False, False, True, False, True, False, True]
    assert labels.column("observed").to_pylist() == [3, 2, 3, 2, 3, 3, 1]
    # invalid rows were not learned from: the model advanced by the four good rows only
    entry = svc.reader.ledger("committed")[-1]
    assert (entry.rows, entry.rows_invalid) == (7, 3)
    assert svc.pipeline.state.mixture.n_rows == 200 + 4  # 700-row seed: 500 warm-up, 200 learned


def test_each_limit(svc):
    big = synthetic_table(7, 1900, SEED)
    r = svc.drop_bytes(_csv(big) + b"x," * 200_000, "huge.csv")
    assert (r.outcome, r.reason) == ("quarantined", "too_large")
    r = svc.drop(synthetic_table(8, 2500, SEED), "long.parquet")
    assert (r.outcome, r.reason) == ("quarantined", "too_many_rows")
    r = svc.drop(synthetic_table(9, 2500, SEED), "long.csv")
    assert (r.outcome, r.reason) == ("quarantined", "too_many_rows")
    wide = synthetic_table(10, 10, SEED)
    for j in range(10):
        wide = wide.append_column(f"extra{j}", pa.array([0.0] * 10))
    r = svc.drop(wide, "wide.parquet")
    assert (r.outcome, r.reason) == ("quarantined", "too_many_columns")
    r = svc.drop(wide, "wide.csv")
    assert (r.outcome, r.reason) == ("quarantined", "too_many_columns")
    svc.good(3)
    _outbox_is_clean(svc, expect=2)


def test_same_content_under_a_new_name_is_a_duplicate(svc):
    first = svc.good(4)
    version = svc.pipeline.state.version
    n_rows = svc.pipeline.state.mixture.n_rows
    r = svc.drop(synthetic_table(4, 300, SEED), "good-4-again.csv")
    assert r.outcome == "duplicate" and r.labels != first.labels and r.labels.exists()
    assert svc.pipeline.state.version == version and svc.pipeline.state.mixture.n_rows == n_rows
    assert pq.read_table(r.labels).column("segment") == pq.read_table(first.labels).column(
        "segment")
    outcomes = [e.outcome for e in svc.reader.ledger()]
    assert outcomes.count("duplicate") == 1


def test_links_fifos_and_folders_are_refused_and_left_alone(svc):
    target = svc.layout.inbox.parent / "outside.csv"
    target.write_bytes(_csv(synthetic_table(11, 20, SEED)))
    inbox = svc.layout.inbox
    os.symlink(target, inbox / "link.csv")
    os.mkfifo(inbox / "pipe.csv")
    (inbox / "sub.csv").mkdir()
    ((inbox / "sub.csv") / "inner.csv").write_bytes(_csv(synthetic_table(12, 20, SEED)))
    wait_until(lambda: svc.service.counts.get("refused", 0) >= 3, svc.timeout, "3 refusals")
    svc.good(5)  # not blocked by the FIFO
    assert os.path.islink(inbox / "link.csv") and (inbox / "pipe.csv").exists()
    assert (inbox / "sub.csv" / "inner.csv").exists()
    assert all(r.name not in ("link.csv", "pipe.csv", "sub.csv") for r in svc.results)
    _outbox_is_clean(svc, expect=2)


def test_odd_names_stay_inside_the_outbox(svc):
    r = svc.drop(synthetic_table(13, 50, SEED), "my drop ..ñ温度.. v2.csv")
    assert r.outcome == "committed"
    assert r.labels.parent == svc.layout.outbox and " " not in r.labels.name
    assert (svc.layout.processed / "my drop ..ñ温度.. v2.csv").exists()


def test_a_file_deleted_before_it_is_read(svc):
    gone = svc.layout.inbox / "gone.csv"
    r = svc.pipeline.process(gone)
    assert r.outcome == "vanished"
    assert list(svc.layout.quarantine.iterdir()) == []
    svc.good(6)


def _outbox_is_clean(svc, expect):
    """Only complete labels files of committed inputs; each has its input's row count."""
    done = [e for e in svc.reader.ledger() if e.outcome in ("committed", "duplicate")]
    names = sorted(p.name for p in svc.layout.outbox.iterdir())
    assert names == sorted(e.labels for e in done) and len(names) == expect
    for e in done:
        assert pq.read_table(svc.layout.outbox / e.labels).num_rows == e.rows


def test_a_dictionary_index_past_its_dictionary_is_a_bad_parquet():
    # Found by the deep Parquet fuzz run: a damaged Parquet file decoded to a dictionary
    # column whose index points past the dictionary, and counting its decoded bytes
    # raised ArrowIndexError out of the pipeline.
    from shoal.daemon.errors import InputRejected
    from shoal.daemon.files.frame import decoded_bytes as _decoded_bytes

    damaged = pa.DictionaryArray.from_arrays(pa.array([0, 21], pa.int32()),
                                             pa.array(["a", "b"]), safe=False)
    batch = pa.RecordBatch.from_arrays([damaged], names=["key"])
    with pytest.raises(InputRejected) as caught:
        _decoded_bytes(batch)
    assert caught.value.reason == "bad_parquet" and "out of bounds" in caught.value.detail


def test_a_footer_declaring_a_128_bit_integer_is_a_bad_parquet(svc):
    # Found by the deep Parquet fuzz run (the file is its shrunk example): a damaged
    # footer made pyarrow raise ArrowNotImplementedError ("Integers with more than 64
    # bits not implemented") out of the pipeline.
    data = (Path(__file__).parents[1] / "data" / "damaged-footer-int128.parquet").read_bytes()
    r = svc.drop_bytes(data, "int128.parquet")
    assert (r.outcome, r.reason) == ("quarantined", "bad_parquet"), r
    assert "more than 64 bits" in svc.sidecar("int128.parquet")["detail"]
    svc.good(4)
    _outbox_is_clean(svc, expect=2)
