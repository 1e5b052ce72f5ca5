"""Group commit: several ready inputs processed in order and committed in ONE transaction.

A group must end in exactly the state that taking its inputs one by one gives
(model arrays, ledger rows with their versions, labels bytes), keep the ledger in
the order inputs were taken even when one of them is quarantined, commit nothing
of its inputs when its commit fails, and commit the inputs before a stop request.
"""
import sqlite3
from pathlib import Path

import numpy as np
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

from drills import synthetic_table, write_config

SEED = 5


def _open(folder: Path):
    from shoal.config import load_config
    from shoal.daemon.files.layout import prepare_folders
    from shoal.daemon.ingest.pipeline import Pipeline
    from shoal.daemon.state.store import StateStore

    settings = load_config(write_config(folder, warmup_rows=400))
    layout = prepare_folders(settings)
    store = StateStore(layout.db, checkpoints_kept=settings.learning.checkpoints_kept)
    return layout, store, Pipeline(settings, layout, store)


def _drops(inbox: Path) -> list[Path]:
    """Warm-up spread over two inputs, new inputs, a duplicate, a corrupt file."""
    paths = []
    for i in range(7):
        name = f"d{i}." + ("parquet" if i % 2 else "csv")
        (pq.write_table if i % 2 else pacsv.write_csv)(synthetic_table(i, 250, SEED),
                                                       inbox / name)
        paths.append(inbox / name)
    (inbox / "d7-copy.csv").write_bytes((inbox / "d4.csv").read_bytes())  # a duplicate
    (inbox / "d8-bad.csv").write_bytes(b"key,ts,f1\nk,1,2\n")             # quarantined
    return paths[:4] + [inbox / "d7-copy.csv", inbox / "d8-bad.csv"] + paths[4:]


def _state(layout, store):
    ledger = store.db.execute("SELECT name, outcome, model_version FROM ledger "
                              "ORDER BY id").fetchall()
    cp = store.latest_checkpoint()
    history = [(h["version"], h["segment"], h["rows"]) for h in store.history()]
    labels = {p.name: p.read_bytes() for p in layout.outbox.iterdir()}
    return ledger, store.model_version, cp.arrays, history, labels


@pytest.fixture(scope="module")
def one_by_one(tmp_path_factory):
    layout, store, pipeline = _open(tmp_path_factory.mktemp("single"))
    results = [pipeline.process(p) for p in _drops(layout.inbox)]
    state = _state(layout, store)
    store.close()
    return [(r.name, r.outcome, r.model_version) for r in results], state


def _same(state, reference):
    ledger, version, arrays, history, labels = state
    ref_ledger, ref_version, ref_arrays, ref_history, ref_labels = reference
    assert ledger == ref_ledger and version == ref_version
    assert arrays.keys() == ref_arrays.keys()
    for key in arrays:
        assert arrays[key].tobytes() == ref_arrays[key].tobytes(), key
    assert history == ref_history
    assert labels == ref_labels


def test_a_group_ends_where_one_by_one_does(tmp_path, one_by_one):
    ref_results, reference = one_by_one
    layout, store, pipeline = _open(tmp_path)
    paths = _drops(layout.inbox)
    results = pipeline.process_group(paths[:3]) + pipeline.process_group(paths[3:])
    assert [(r.name, r.outcome, r.model_version) for r in results] == ref_results
    assert {r.outcome for r in results} == {"committed", "duplicate", "quarantined"}
    _same(_state(layout, store), reference)
    assert list(layout.inbox.iterdir()) == []
    # one checkpoint per commit, not per input: [d0 d1 d2]; [d3 d7-copy] committed before
    # d8-bad's quarantine (the copy comes first, so d4 is the duplicate); [d4 d5 d6]
    assert [v for (v,) in store.db.execute("SELECT version FROM checkpoints")] == [3, 5, 7]
    store.close()


def test_a_failed_group_commit_keeps_nothing_and_is_redone(tmp_path, one_by_one, monkeypatch):
    _, reference = one_by_one
    layout, store, pipeline = _open(tmp_path)
    paths = _drops(layout.inbox)
    pipeline.process_group(paths[:2])
    before = store.model_version
    real = store.commit_inputs

    def full_disk(commits):
        raise sqlite3.OperationalError("database or disk is full")

    monkeypatch.setattr(store, "commit_inputs", full_disk)
    with pytest.raises(sqlite3.OperationalError):
        pipeline.process_group(paths[2:5])
    # d2, d3 and d7-copy learned and their labels written, but nothing committed: the
    # store is as before and every input still in the inbox
    assert store.model_version == before and len(store.ledger()) == 2
    assert all(p.exists() for p in paths[2:5])
    monkeypatch.setattr(store, "commit_inputs", real)
    pipeline.state = pipeline.load_state()   # what the service does after a failure
    pipeline.process_group(paths[2:])
    _same(_state(layout, store), reference)
    store.close()


def test_a_stop_commits_the_inputs_before_it(tmp_path):
    layout, store, pipeline = _open(tmp_path)
    paths = _drops(layout.inbox)[:4]
    real = pipeline._process_one

    def stop_after_two(path, in_inbox):
        result = real(path, in_inbox)
        if path == paths[1]:
            pipeline.stop.set()
        return result

    pipeline._process_one = stop_after_two
    results = pipeline.process_group(paths)
    assert [r.name for r in results] == ["d0.csv", "d1.parquet"]
    assert [e.name for e in store.ledger()] == ["d0.csv", "d1.parquet"]
    assert not paths[0].exists() and not paths[1].exists()
    assert paths[2].exists() and paths[3].exists()
    assert np.isfinite(pipeline.state.mixture.weights).all()
    # a stop is not a death: no attempt is left to count against the inputs not taken
    assert store.db.execute("SELECT COUNT(*) FROM attempts").fetchone()[0] == 0
    store.close()
