"""The lifecycle's samples and pool wait to do their work until a decision needs it; what
they hold must be what doing the work at every piece gives (checked against a plain
reference computed here on the whole stream), whatever the cut into pieces."""
import numpy as np
import pytest

from shoal.core import Mixture
from shoal.core.lifecycle import unexplained
from shoal.daemon.segments import life_rows
from shoal.daemon.segments.life_rows import SAMPLE_STRIDE, Samples, UnexplainedPool

D = 3


def _stream(seed, n=6000):
    """Seeded rows, segment labels (one rare segment) and log-densities, some rows
    missing a feature (NaN, log-density +inf as complete_only gives them)."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, D))
    labels = rng.choice([3, 5, 8, 11], size=n, p=[0.5, 0.3, 0.17, 0.03])
    log_density = rng.normal(-4.0, 1.0, n)
    gappy = rng.random(n) < 0.02
    X[gappy, 1] = np.nan
    log_density[gappy] = np.inf
    return X, labels, log_density


def _reference(X, labels, log_density, stop, sid, cap):
    """Segment ``sid``'s sample after ``stop`` rows: its newest ``cap`` complete rows
    among stream positions 0, SAMPLE_STRIDE, ..., rounded to float32."""
    at = np.arange(0, stop, SAMPLE_STRIDE)
    at = at[(labels[at] == sid) & (log_density[at] != np.inf)][-cap:]
    return X[at].astype(np.float32).astype(np.float64)


def _feed(samples, X, labels, log_density, cuts, on_piece=None):
    for a, b in zip(cuts[:-1], cuts[1:]):
        first = (-a) % SAMPLE_STRIDE
        picked = labels[a:b][first::SAMPLE_STRIDE]
        ids, counts = np.unique(picked, return_counts=True)
        samples.add(X[a:b], first, picked, log_density[a:b][first::SAMPLE_STRIDE],
                    dict(zip(ids.tolist(), counts.tolist())), [3, 5, 8, 11])
        if on_piece is not None:
            on_piece(b)


@pytest.mark.parametrize("waiting_values", [1 << 21, 700])
def test_samples_taken_late_are_the_newest_rows_of_each_segment(waiting_values, monkeypatch):
    # 700 values: the waiting rows are taken in every few pieces (the memory bound)
    monkeypatch.setattr(life_rows, "_WAITING_VALUES", waiting_values)
    X, labels, log_density = _stream(1)
    rng = np.random.default_rng(2)
    cuts = np.unique(np.concatenate([[0, len(X)], rng.integers(1, len(X), 40)]))
    samples = Samples({"sample": {}}, D)
    assert samples.cap == 200

    taken = []

    def on_piece(stop):   # a split test of segment 5 or 11 every third piece
        if len(taken) % 3 == 2:
            sid = 5 if len(taken) % 2 else 11
            np.testing.assert_array_equal(
                samples.take(sid), _reference(X, labels, log_density, stop, sid, samples.cap))
        taken.append(stop)

    _feed(samples, X, labels, log_density, cuts, on_piece)
    assert len(taken) > 30
    state = {"sample": {}}
    samples.state = state
    samples.pack([3, 5, 8, 11])
    for sid in (3, 5, 8, 11):
        back = Samples(state, D).take(sid)   # as the next input reads the checkpoint
        np.testing.assert_array_equal(back, _reference(X, labels, log_density, len(X),
                                                       sid, samples.cap))
        assert not np.isnan(back).any()


def test_samples_fed_rows_copied_out_as_float32_hold_the_same_rows():
    # the learning loop hands the sampled rows over as piece_tallies copies them out
    # (float32, with their log-densities); a sample rounds its rows to float32 anyway
    from shoal.core.piece_tallies import piece_tallies
    X, labels, log_density = _stream(5)
    cuts = [0, 1000, 1001, 2500, 4096, 6000]
    plain, copied = Samples({"sample": {}}, D), Samples({"sample": {}}, D)
    _feed(plain, X, labels, log_density, cuts)
    for a, b in zip(cuts[:-1], cuts[1:]):
        first = (-a) % SAMPLE_STRIDE
        tallies = piece_tallies(log_density[a:b], np.zeros(b - a, dtype=np.int64), X[a:b],
                                np.zeros(D), 1, first=first, stride=SAMPLE_STRIDE, sample=True)
        assert tallies.sample_rows.dtype == np.float32
        picked = labels[a:b][first::SAMPLE_STRIDE]
        ids, counts = np.unique(picked, return_counts=True)
        copied.add(X[a:b], first, picked, tallies.sample_ld,
                   dict(zip(ids.tolist(), counts.tolist())), [3, 5, 8, 11],
                   rows=tallies.sample_rows)
    for sid in (3, 5, 8, 11):
        np.testing.assert_array_equal(copied.take(sid), plain.take(sid))
        np.testing.assert_array_equal(copied.take(sid),
                                      _reference(X, labels, log_density, len(X), sid, 200))


def test_samples_restart_and_forget():
    X, labels, log_density = _stream(3)
    samples = Samples({"sample": {}}, D)
    _feed(samples, X, labels, log_density, [0, 2500, 4000])
    samples.restart(5)          # a split: rows that waited were the whole segment's
    _feed(samples, X, labels, log_density, [4000, 6000])
    at = np.arange(4000, 6000, SAMPLE_STRIDE)
    at = at[(labels[at] == 5) & (log_density[at] != np.inf)][-samples.cap:]
    np.testing.assert_array_equal(samples.take(5), X[at].astype(np.float32))
    samples.keep_only({"3", "5"})
    samples.pack([3, 5])
    assert sorted(samples.state["sample"]) == ["3", "5"]


@pytest.mark.parametrize("waiting_pieces", [32, 2])
def test_pool_tested_late_holds_the_rows_testing_every_piece_would(waiting_pieces,
                                                                    monkeypatch):
    # Pieces learned by a mixture (its parameters move from piece to piece); the pool's
    # rows must be those core's unexplained() finds with each piece's own model, kept
    # as a pool tested at every piece keeps them: the newest `keep` as they come, and
    # none before the last trim. (2: the waiting rows are tested every few pieces.)
    monkeypatch.setattr(life_rows, "_WAITING_PIECES", waiting_pieces)
    rng = np.random.default_rng(4)
    m = Mixture.from_parameters([0.6, 0.4], [[0.0, 0.0, 0.0], [6.0, 0.0, 0.0]],
                                np.stack([np.eye(3)] * 2), refresh_rows=500)
    pool = UnexplainedPool({"X": [], "rows": []}, D, 0.99, keep=60)
    want_X, want_rows, start, since = [], [], 0, 0
    for piece in range(12):
        X = np.concatenate([rng.normal(size=(400, 3)), rng.normal(size=(100, 3)) * 3.0 + 6.0])
        before = m
        m, scores = m.learn(X)
        pool.add(before, X, scores)
        far = np.flatnonzero(unexplained(before, X, 0.99))
        want_X.append(X[far])
        want_rows.append(start + far)
        start += len(X)
        if piece in (5, 9):
            since = start - 1200
            pool.trim(since)
    rows, X_all = np.concatenate(want_rows), np.concatenate(want_X)
    kept = np.arange(len(rows))[-60:]
    kept = kept[rows[kept] >= since]
    assert len(kept) > 10
    state = pool.to_state()
    np.testing.assert_array_equal(state["rows"], rows[kept].tolist())
    np.testing.assert_allclose(state["X"], X_all[kept])


def test_a_sample_read_back_in_the_same_process_is_what_a_restart_reads():
    # the rows a packed sample is remembered by (so that the next input of a running
    # service does not decode it) are those decoding gives: rounded to float32
    from shoal.daemon.segments import life_rows

    rows = np.random.default_rng(4).normal(size=(300, 5)) * 1e3
    packed = life_rows._pack(rows)
    remembered = life_rows._unpack(packed, 5)
    life_rows._unpacked.clear()     # as in a new process
    decoded = life_rows._unpack(packed, 5)
    assert remembered is not decoded and np.array_equal(remembered, decoded)
    assert not np.array_equal(decoded, rows)    # rounded, as the checkpoint keeps them
    assert not remembered.flags.writeable
