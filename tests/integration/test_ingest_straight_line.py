"""One input in a straight line: the thread that calls the pipeline owns the model, the
claim is decided before the labels are named (a duplicate's frames are read once when
its digest is at hand), and the labels writer only writes what it is handed."""
import os
import threading

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from shoal.config import load_config
from shoal.core import Mixture
from shoal.daemon.cli.main import open_service_parts
from drills import synthetic_table, write_config
from shoal.daemon.files import readers
from shoal.daemon.files.writer import LabelsFile, write_labels_stream
from shoal.daemon.ingest import pipeline as pipeline_module
from shoal.daemon.ingest import stages as stages_module

SEED = 11


@pytest.fixture(params=[True, False], ids=["threads", "inline"])
def threaded(request, monkeypatch):
    """Inputs taken with helper threads (as large inputs are) or in one thread."""
    monkeypatch.setattr(pipeline_module, "THREADED_BYTES", 0 if request.param else 1 << 40)
    return request.param


def test_the_model_learns_only_in_the_thread_that_calls_the_pipeline(tmp_path, monkeypatch,
                                                                     threaded):
    learners = set()
    real = Mixture.learn

    def learn(self, X, *args, **kw):
        learners.add(threading.current_thread().name)
        return real(self, X, *args, **kw)

    monkeypatch.setattr(Mixture, "learn", learn)
    monkeypatch.setattr(stages_module, "iter_frames",
                        lambda *a, **k: readers.iter_frames(*a, **k, rows=1000))
    settings = load_config(write_config(tmp_path, warmup_rows=600))
    drops = []
    for i in range(2):
        drops.append(tmp_path / f"in-{i}.parquet")
        pq.write_table(synthetic_table(i, 4000, SEED), drops[-1])
    with open_service_parts(settings) as (layout, store, pipeline):
        results = [pipeline.process(p, in_inbox=False) for p in drops]
    assert [r.outcome for r in results] == ["committed"] * 2
    # several frames were learned (warm-up, then 4 frames), all by this thread
    assert learners == {threading.current_thread().name}


def test_a_duplicate_whose_digest_is_at_hand_is_read_once(tmp_path, monkeypatch):
    monkeypatch.setattr(pipeline_module, "THREADED_BYTES", 1 << 40)   # hashed inline
    reads = []
    real = stages_module.iter_frames

    def frames(f, *args, **kw):
        reads.append(os.path.basename(os.readlink(f"/proc/self/fd/{f.fileno()}")))
        return real(f, *args, **kw)

    monkeypatch.setattr(stages_module, "iter_frames", frames)
    settings = load_config(write_config(tmp_path, warmup_rows=600))
    first, second = tmp_path / "a.parquet", tmp_path / "b.parquet"
    pq.write_table(synthetic_table(0, 2000, SEED), first)
    second.write_bytes(first.read_bytes())
    with open_service_parts(settings) as (layout, store, pipeline):
        a = pipeline.process(first, in_inbox=False)
        version = pipeline.state.version
        b = pipeline.process(second, in_inbox=False)
        assert (a.outcome, b.outcome) == ("committed", "duplicate")
        assert pipeline.state.version == version   # not learned
    # the duplicate's frames were read once, for its labels: it was never learned as new
    assert reads == ["a.parquet", "b.parquet"]
    assert pq.read_table(b.labels).column("segment").equals(
        pq.read_table(a.labels).column("segment"))


def _tables(n_tables=3, rows=1000):
    rng = np.random.default_rng(SEED)
    return [pa.table({"id": np.arange(i * rows, (i + 1) * rows),
                      "segment": rng.integers(0, 4, rows),
                      "log_density": rng.normal(size=rows)}) for i in range(n_tables)]


@pytest.mark.parametrize("threads", [True, False])
@pytest.mark.parametrize("fmt", ["parquet", "csv"])
def test_a_labels_file_kept_equals_the_stream_writer_s_byte_for_byte(tmp_path, threads, fmt):
    tables = _tables()
    meta = {"input_digest": "ab" * 32, "model_version": 7}
    # reference: the streaming writer given its metadata up front
    reference = write_labels_stream(iter(tables), tmp_path / f"ref.{fmt}", fmt, lambda: meta,
                                    threaded=False)
    with LabelsFile(tmp_path / f"tmp.{fmt}", fmt, threaded=threads) as out:
        out.write_all(iter(tables))
        kept = out.keep(meta, tmp_path / f"kept.{fmt}")
    assert kept == tmp_path / f"kept.{fmt}"
    assert kept.read_bytes() == reference.read_bytes()
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted([f"ref.{fmt}", f"kept.{fmt}"])


@pytest.mark.parametrize("threads", [True, False])
def test_a_labels_file_not_kept_leaves_nothing(tmp_path, threads):
    with LabelsFile(tmp_path / "x.parquet", "parquet", threaded=threads) as out:
        out.write_all(iter(_tables()))
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("threads", [True, False])
def test_a_write_error_is_raised_to_the_caller_and_leaves_nothing(tmp_path, threads):
    good, = _tables(1)
    other = pa.table({"other": [1, 2, 3]})   # a second schema: the Parquet writer refuses it
    with pytest.raises(ValueError):
        with LabelsFile(tmp_path / "x.parquet", "parquet", threaded=threads) as out:
            out.write_all(iter([good, other] + _tables(4)))
            out.keep({"model_version": 1})
    assert list(tmp_path.iterdir()) == []
    assert not [t for t in threading.enumerate() if t.name == "shoal-labels"]
