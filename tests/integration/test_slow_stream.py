"""A slow stream (100-row drops) learns between drops when ``learning.refresh_rows`` is small.

The stream is the seeded K=6, D=5 mixture of tests/support/drift_stream.py, fed as Parquet
drops through the real pipeline in-process. The reference for "half the jump within a
half-life" is the definition of the half-life under geometric forgetting (a constant
step ``eta = 1 - 2^(-1/h)`` leaves ``(1 - eta)^n`` of the old mean after ``n`` rows);
the refreshes every 256 rows and the rows' responsibilities add the lag allowed here
(1.2 half-lives).
"""
import numpy as np

from drift_stream import FEATURES, rows as _rows, truth as _truth, stream  # noqa: F401 (stream: a fixture)

HALF_LIFE = 5000
SLOW = {"half_life_rows": HALF_LIFE, "warmup_rows": 2000,
        "learning": {"refresh_rows": 256},
        "drift": {"window_rows": 1024, "settle_rows": 4096},
        "lifecycle": {"check_rows": 1024}}
CHANGE_ROW = 10_000
COMP, FEATURE = 2, 3               # a segment with 12.6% of the rows; the feature that jumps


def _jump_stream(seed=31):
    weights, means, covs = _truth()
    sd = float(np.sqrt(covs[COMP][FEATURE, FEATURE]))
    rng = np.random.default_rng(seed)
    X = np.concatenate([
        _rows(rng, CHANGE_ROW, weights, means, covs),
        _rows(rng, 8000, weights, means, covs, shift=(COMP, FEATURE, 3.0 * sd))])
    return X, means[COMP], 3.0 * sd


def test_a_slow_stream_follows_a_three_sd_jump_within_a_half_life(stream):
    X, true_mean, jump = _jump_stream()
    s = stream(**SLOW)
    s.feed(X[:CHANGE_ROW], 100)
    segment = s.segment_of(true_mean)
    m = s.pipeline.state.mixture
    k = int(np.flatnonzero(m.ids == segment)[0])
    start = m.data_means()[k, FEATURE]
    covered_at = None
    for lo in range(CHANGE_ROW, len(X), 100):
        s.feed(X[lo:lo + 100], 100)
        m = s.pipeline.state.mixture
        assert segment in m.ids.tolist(), "the jumped segment was retired or merged away"
        k = int(np.flatnonzero(m.ids == segment)[0])
        if covered_at is None and (m.data_means()[k, FEATURE] - start) >= 0.5 * jump:
            covered_at = lo + 100 - CHANGE_ROW
    print(f"half of a 3-sd jump covered {covered_at} rows after it (half-life {HALF_LIFE}); "
          f"{len(m.ids)} segments at the end")
    assert covered_at is not None and covered_at <= 1.2 * HALF_LIFE


def test_a_slow_stream_gives_the_same_model_however_it_is_cut(stream):
    X, _, _ = _jump_stream()
    X = X[:14_000]
    models = []
    for drop in (100, 37, 1000):
        s = stream(**SLOW)
        s.feed(X, drop)
        models.append(s.pipeline.state.mixture)
    first = models[0]
    assert first.n_rows == len(X) - SLOW["warmup_rows"]
    for other in models[1:]:
        assert other.ids.tolist() == first.ids.tolist()
        assert other.n_rows == first.n_rows
        for name in ("s0", "s1", "s2", "weights", "means", "covariances"):
            np.testing.assert_allclose(getattr(other, name), getattr(first, name),
                                       rtol=1e-9, atol=1e-12, err_msg=name)
