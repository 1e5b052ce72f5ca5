"""State store: pragmas, exact checkpoint round trip without pickle, one-transaction commits."""
import io
import sqlite3

import numpy as np
import pytest

from shoal.daemon.errors import StateError
from shoal.daemon.state.store import (
    Checkpoint,
    HistoryRow,
    InputCommit,
    LedgerEntry,
    StateStore,
    npy_array,
    npy_bytes,
)


def _entry(name="a.csv", digest="ab" * 32, outcome="committed"):
    return LedgerEntry(digest=digest, name=name, size=10, outcome=outcome, rows=3, rows_invalid=0,
                       seen_at=1.0)


def _cp(version, seed=0):
    rng = np.random.default_rng(seed)
    return Checkpoint(version, {"means": rng.normal(size=(3, 2)),
                                "ids": np.arange(3, dtype=np.int64)},
                      {"format_version": 1}, {"unusual_below": -3.5})


def test_wal_and_full_sync(tmp_path):
    store = StateStore(tmp_path / "s.db")
    assert store.db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert store.db.execute("PRAGMA synchronous").fetchone()[0] == 2  # 2 = FULL (SQLite docs)
    tables = {r[0] for r in store.db.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    assert {"ledger", "checkpoints", "segment_history", "alert_outbox", "warmup"} <= tables
    store.close()


def test_checkpoint_round_trip_is_exact_and_versions_follow(tmp_path):
    store = StateStore(tmp_path / "s.db", checkpoints_kept=2)
    for v in (1, 2, 3):
        store.commit_input(_entry(f"{v}.csv", digest=f"{v:064x}"), learned=True, checkpoint=_cp(v, v),
                           history=[HistoryRow(0, 0.5, 10, [1.0, 2.0], [0.1, 0.2])])
    store.close()
    store = StateStore(tmp_path / "s.db", checkpoints_kept=2)
    cp = store.latest_checkpoint()
    assert store.model_version == 3 and cp.version == 3
    want = _cp(3, 3)
    for k, a in want.arrays.items():
        assert cp.arrays[k].dtype == a.dtype and cp.arrays[k].tobytes() == a.tobytes()
    assert cp.extra == {"unusual_below": -3.5}
    kept = [r[0] for r in store.db.execute("SELECT version FROM checkpoints ORDER BY version")]
    assert kept == [2, 3]
    assert [h["version"] for h in store.history(0)] == [1, 2, 3]
    with pytest.raises(StateError, match="does not follow"):
        store.commit_input(_entry("x.csv"), learned=True, checkpoint=_cp(9))


def test_pickled_arrays_are_refused(tmp_path):
    buf = io.BytesIO()
    np.save(buf, np.array([{"a": 1}], dtype=object), allow_pickle=True)
    with pytest.raises(ValueError):
        npy_array(buf.getvalue())
    store = StateStore(tmp_path / "s.db")
    with pytest.raises(StateError, match="dtype object"):
        store.commit_input(_entry(), learned=True,
                           checkpoint=Checkpoint(1, {"x": np.array([None])}, {}, {}))
    # nothing of the failed commit is visible
    assert store.model_version == 0 and store.ledger() == [] and store.latest_checkpoint() is None


def test_a_failed_commit_leaves_no_trace(tmp_path):
    store = StateStore(tmp_path / "s.db")
    store.commit_input(_entry("first.csv", digest="1" * 64), learned=True, checkpoint=_cp(1))
    with pytest.raises(sqlite3.IntegrityError):  # same checkpoint version twice
        store.commit_input(_entry("second.csv", digest="2" * 64), learned=False, checkpoint=_cp(1),
                           warmup_rows=np.ones((4, 2)))
    assert [e.name for e in store.ledger()] == ["first.csv"]
    assert store.warmup_rows() is None and store.model_version == 1


def test_find_done_and_warmup_buffer(tmp_path):
    store = StateStore(tmp_path / "s.db")
    store.commit_input(_entry("a.csv", digest="f" * 64), learned=True, warmup_rows=np.zeros((2, 3)))
    store.commit_input(_entry("b.csv", digest="f" * 64, outcome="duplicate"), learned=False)
    store.record_quarantine(_entry("c.csv", digest="e" * 64, outcome="quarantined"))
    store.commit_input(_entry("d.csv", digest="d" * 64), learned=True, warmup_rows=np.ones((3, 3)))
    assert [e.name for e in store.find_done("f" * 64)] == ["a.csv", "b.csv"]
    assert store.find_done("e" * 64) == []  # a quarantined content may be tried again
    assert store.model_version == 2
    np.testing.assert_array_equal(store.warmup_rows(), np.vstack([np.zeros((2, 3)),
                                                                  np.ones((3, 3))]))
    store.commit_input(_entry("e.csv", digest="c" * 64), learned=True, clear_warmup=True)
    assert store.warmup_rows() is None


def test_unreadable_store_is_a_state_error(tmp_path):
    db = tmp_path / "s.db"
    db.write_bytes(b"this is not a database" * 100)
    with pytest.raises(StateError, match="cannot be used"):
        StateStore(db)


@pytest.mark.parametrize("array", [
    np.random.default_rng(0).normal(size=(3, 4, 4)), np.arange(5, dtype=np.int64),
    np.float64(2.5), np.zeros((0, 3)), np.array([True, False]), np.ones(3, dtype=">f4"),
    np.asfortranarray(np.arange(6.0).reshape(2, 3)), np.arange(12.0).reshape(3, 4)[:, ::2]])
def test_npy_bytes_are_what_np_save_writes(array):
    buf = io.BytesIO()
    np.save(buf, array, allow_pickle=False)  # the reference: numpy's own .npy writer
    for _ in range(2):  # the second time from the cached header
        assert npy_bytes(array) == buf.getvalue()
    back = npy_array(npy_bytes(array))
    assert back.dtype == array.dtype and back.shape == array.shape
    np.testing.assert_array_equal(back, array)


def test_commit_inputs_is_one_transaction_with_a_version_per_input(tmp_path):
    store = StateStore(tmp_path / "s.db")
    group = [InputCommit(_entry("a.csv", digest="a" * 64), learned=True,
                         history=[HistoryRow(0, 1.0, 5, [0.0], [1.0])], alerts=[("x1", {"n": 1})]),
             InputCommit(_entry("b.csv", digest="a" * 64, outcome="duplicate"), learned=False),
             InputCommit(_entry("c.csv", digest="c" * 64), learned=True, checkpoint=_cp(2),
                         history=[HistoryRow(0, 1.0, 9, [0.5], [1.0])])]
    assert store.commit_inputs(group) == [1, 1, 2]
    assert [(e.name, e.model_version) for e in store.ledger()] == \
        [("a.csv", 1), ("b.csv", 1), ("c.csv", 2)]
    assert store.model_version == 2 and store.latest_checkpoint().version == 2
    assert [(h["version"], h["rows"]) for h in store.history(0)] == [(1, 5), (2, 9)]
    assert [a["version"] for a in store.alerts()] == [1]
    # A group fails as a whole: the second input's checkpoint does not follow.
    bad = [InputCommit(_entry("d.csv", digest="d" * 64), learned=True),
           InputCommit(_entry("e.csv", digest="e" * 64), learned=True, checkpoint=_cp(9))]
    with pytest.raises(StateError, match="does not follow"):
        store.commit_inputs(bad)
    assert store.model_version == 2 and len(store.ledger()) == 3
    assert not store.db.in_transaction
    store.close()


def test_extra_json_is_the_plain_encoding_whichever_baseline_it_kept():
    # the checkpoint's extra data keeps the drift baseline's text between checkpoints
    # (the record is replaced whole, never changed): the text must be json.dumps's
    import json

    from shoal.daemon.state.checkpoints import extra_json
    rng = np.random.default_rng(3)

    def baseline():
        return {"ids": [0, 1], "means": rng.normal(size=(2, 3)).tolist(),
                "covariances": rng.normal(size=(2, 3, 3)).tolist(), "note": "a \u0000 b"}

    first, second = baseline(), baseline()
    window = {"index": 7, "segments": {"0": {"T": 1.5, "S": [[0.1, 2e-300]]}}}
    extras = [
        {"segment_rows": {"0": 3}},                                    # no drift
        {"drift": None, "unusual_below": -3.5},
        {"drift": {"baseline": None, "window": window}},             # before a baseline
        {"drift": {"baseline": first, "window": window}, "z": [1.0]},
        {"drift": {"baseline": first, "window": None}, "a": "\u00e9"},  # kept text reused
        {"drift": {"baseline": second, "recent": [1, 2]}},           # replaced
        {"drift": {"baseline": first}},                                # and back
    ]
    for extra in extras:
        assert extra_json(extra) == json.dumps(extra, sort_keys=True)
        assert json.loads(extra_json(extra)) == extra
