"""Nothing lost, nothing mixed up, whatever a producer does to a file while shoal reads it.

A file renamed over the input being read is a new input (the one read is moved by
identity); a file that grows while it is read is not committed but taken again once
settled; a Parquet file without its footer waits as incomplete; two names with one
content get a labels file each; a failure that belongs to one input quarantines that
input alone, and the rest of its group is committed.
"""
import json
import logging
import os
from pathlib import Path

import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

from shoal.daemon.ingest import stages as stages_module
from shoal.daemon.files import readers
from drills import InProcessService, synthetic_table, wait_until, write_config

SEED = 11


def _open(folder: Path, **overrides):
    from shoal.config import load_config
    from shoal.daemon.files.layout import prepare_folders
    from shoal.daemon.ingest.pipeline import Pipeline
    from shoal.daemon.state.store import StateStore

    settings = load_config(write_config(folder, warmup_rows=400, **overrides))
    layout = prepare_folders(settings)
    store = StateStore(layout.db)
    return layout, store, Pipeline(settings, layout, store)


def _csv_bytes(table: pa.Table) -> bytes:
    sink = pa.BufferOutputStream()
    pacsv.write_csv(table, sink)
    return sink.getvalue().to_pybytes()


def _when_read(monkeypatch, name: str, action):
    """Run ``action()`` once the input called ``name`` has yielded its first frame."""
    real = stages_module.iter_frames

    def frames(f, *args, **kw):
        path = os.readlink(f"/proc/self/fd/{f.fileno()}")
        first = True
        for frame in real(f, *args, **kw):
            yield frame
            if first and os.path.basename(path) == name:
                first = False
                action()

    monkeypatch.setattr(stages_module, "iter_frames", frames)


def _ledger(store):
    return [(e.name, e.outcome, e.rows) for e in store.ledger()]


def test_a_file_renamed_over_the_input_while_it_is_read_is_a_new_input(tmp_path, monkeypatch):
    with InProcessService(tmp_path, warmup_rows=400) as svc:
        staging = tmp_path / "staging"
        staging.mkdir()
        (staging / "latest.csv").write_bytes(_csv_bytes(synthetic_table(1, 300, SEED)))
        raised = []
        _when_read(monkeypatch, "latest.csv", lambda: raised or raised.append(
            os.rename(staging / "latest.csv", svc.layout.inbox / "latest.csv")))
        r = svc.drop(synthetic_table(0, 4000, SEED), "latest.csv")
        assert raised and (r.outcome, r.rows) == ("committed", 4000)
        r = svc.wait_results(2)        # the replacement: read, not moved away unread
        assert (r.name, r.outcome, r.rows) == ("latest.csv", "committed", 300)
        assert _ledger(svc.reader) == [("latest.csv", "committed", 4000),
                                       ("latest.csv", "committed", 300)]
        # the file read first had no name left to move; the replacement was moved once read
        moved = sorted(p.name for p in svc.layout.processed.iterdir())
        assert moved == ["latest.csv"]
        assert len((svc.layout.processed / "latest.csv").read_bytes().splitlines()) == 301


def test_a_file_that_grows_while_it_is_read_is_taken_again_once_settled(tmp_path, monkeypatch):
    data = _csv_bytes(synthetic_table(2, 3000, SEED))
    head = data[:data.index(b"\n", len(data) // 4) + 1]   # the header and ~750 rows
    with InProcessService(tmp_path, warmup_rows=400, watch={"settle_seconds": 0.3}) as svc:
        path = svc.layout.inbox / "slow.csv"

        def resume():   # the writer goes on after a pause longer than the settle time
            if path.stat().st_size == len(head):
                with open(path, "ab") as f:
                    f.write(data[len(head):])

        _when_read(monkeypatch, "slow.csv", resume)
        with open(path, "wb") as f:           # written in place, then a pause
            f.write(head)
        first = svc.wait_results(1)
        assert first.outcome == "changed", first
        assert svc.reader.ledger() == [] and not list(svc.layout.outbox.iterdir())
        r = svc.wait_results(2)
        assert (r.outcome, r.rows) == ("committed", 3000)
        assert _ledger(svc.reader) == [("slow.csv", "committed", 3000)]
        assert (svc.layout.processed / "slow.csv").read_bytes() == data


def test_a_parquet_file_without_its_footer_waits_until_it_is_complete(tmp_path):
    sink = pa.BufferOutputStream()
    pq.write_table(synthetic_table(3, 700, SEED), sink)
    data = sink.getvalue().to_pybytes()
    with InProcessService(tmp_path, warmup_rows=400,
                          watch={"settle_seconds": 0.2, "incomplete_seconds": 2.0}) as svc:
        growing = svc.layout.inbox / "growing.parquet"
        growing.write_bytes(data[: len(data) // 2])           # the writer pauses
        (tmp_path / "abandoned.parquet").write_bytes(data[: len(data) // 3])
        os.rename(tmp_path / "abandoned.parquet", svc.layout.inbox / "abandoned.parquet")
        wait_until(lambda: svc.service.gate._seen.get(str(growing)) is not None, 10,
                   "the gate to see the incomplete file")
        with open(growing, "r+b") as f:                       # ... and finishes it
            f.seek(len(data) // 2)
            f.write(data[len(data) // 2:])
        results = {r.name: r for r in (svc.wait_results(1), svc.wait_results(2))}
        assert (results["growing.parquet"].outcome, results["growing.parquet"].rows) == \
            ("committed", 700)
        assert (results["abandoned.parquet"].outcome, results["abandoned.parquet"].reason) \
            == ("quarantined", "truncated_parquet")


def test_two_names_of_one_content_get_a_labels_file_each(tmp_path):
    layout, store, pipeline = _open(tmp_path)
    data = _csv_bytes(synthetic_table(4, 600, SEED))
    (layout.inbox / "sensor 1.csv").write_bytes(data)
    first = pipeline.process(layout.inbox / "sensor 1.csv")
    pacsv.write_csv(synthetic_table(5, 300, SEED), layout.inbox / "other.csv")
    pipeline.process(layout.inbox / "other.csv")
    (layout.inbox / "sensor_1.csv").write_bytes(data)
    second = pipeline.process(layout.inbox / "sensor_1.csv")
    assert (first.outcome, second.outcome) == ("committed", "duplicate")
    assert first.labels.name != second.labels.name
    assert first.labels.exists() and second.labels.exists()
    versions = [pq.read_table(r.labels).column("model_version").to_pylist()[0]
                for r in (first, second)]
    assert versions == [1, 2]             # the original's labels were not replaced
    labels = [e.labels for e in store.ledger()]
    assert labels[0::2] == [first.labels.name, second.labels.name]
    assert len(set(labels)) == 3          # one labels file per ledger entry
    store.close()


@pytest.mark.parametrize("where,reason", [("read", "unreadable"), ("learn", "internal_error")])
def test_an_unforeseen_failure_quarantines_that_input_and_commits_the_rest_of_its_group(
        tmp_path, monkeypatch, where, reason):
    layout, store, pipeline = _open(tmp_path)
    names = ["a.csv", "b.csv", "c.csv"]
    for i, name in enumerate(names):
        pacsv.write_csv(synthetic_table(i, 500, SEED), layout.inbox / name)
    real_frames = getattr(readers, "_iter_frames", None)
    real_learn = stages_module.learn_chunks

    def frames(f, *args, **kw):   # inside the reader, as a parser's own error would be
        bad = os.readlink(f"/proc/self/fd/{f.fileno()}").endswith("b.csv")
        for frame in real_frames(f, *args, **kw):
            if bad and where == "read":
                raise KeyError("a parser's own error")
            yield frame

    def learn(settings, mixture, X, *args, **kw):
        if where == "learn" and getattr(pipeline, "_poisoned", False):
            raise TypeError("'<' not supported between instances of 'str' and 'float'")
        return real_learn(settings, mixture, X, *args, **kw)

    if where == "read":
        monkeypatch.setattr(readers, "_iter_frames", frames)
    monkeypatch.setattr(stages_module, "learn_chunks", learn)
    real_one = pipeline._process_one

    def one(path, in_inbox):
        pipeline._poisoned = path.name == "b.csv"
        return real_one(path, in_inbox)

    pipeline._process_one = one
    records = []
    handler = logging.Handler(logging.WARNING)
    handler.emit = records.append
    logging.getLogger("shoal").addHandler(handler)
    try:
        results = pipeline.process_group([layout.inbox / n for n in names])
    finally:
        logging.getLogger("shoal").removeHandler(handler)
    assert [(r.name, r.outcome, r.reason) for r in results] == [
        ("a.csv", "committed", None), ("b.csv", "quarantined", reason),
        ("c.csv", "committed", None)]
    assert _ledger(store) == [("a.csv", "committed", 500), ("b.csv", "quarantined", None),
                              ("c.csv", "committed", 500)]
    side = json.loads((layout.quarantine / "b.csv.json").read_text())
    assert side["reason"] == reason
    assert side["exception"] in ("KeyError", "TypeError") and side["exception"] in side["detail"]
    logged, = [r.fields for r in records if getattr(r, "event", "") == "input_quarantined"]
    assert logged["reason"] == reason and "Traceback" in logged["traceback"]
    assert store.model_version == 2 and not (layout.inbox / "c.csv").exists()
    store.close()
