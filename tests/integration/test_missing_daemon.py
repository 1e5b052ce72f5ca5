"""Rows with missing features through the real pipeline: labels (segment, observed,
unusual), drift windows that stay quiet under missing-at-random values, and the
missing-share alert when a feature goes missing from one segment's rows.

Streams are the seeded K=6, D=5 synthetic mixtures of tests/support/drift_stream.py fed as
Parquet drops with nulls, with the shipped default settings except ``segments: 6``.
The long stationary run (2,000,000 rows) is ``scripts/bench_drift_missing.py``.
"""
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from drift_stream import (D, FEATURES, K, first_raised as _first_raised, rows as _rows,  # noqa: F401
                          stream, truth as _truth)


def _mar(rng, X, share):
    """Missing at random: feature j is missing with a probability that depends on the
    observed feature 0 (never missing) so that the mean share is ``share``."""
    X = X.copy()
    hi = X[:, 0] > np.median(X[:, 0])
    p = np.where(hi, 1.6 * share, 0.4 * share)[:, None]
    hole = rng.random(X.shape) < p
    hole[:, 0] = False
    X[hole] = np.nan
    return X


def test_stationary_stream_with_missing_at_random_values_raises_nothing(stream):
    weights, means, covs = _truth()
    rng = np.random.default_rng(31)
    s = stream()
    for _ in range(12):
        s.feed(_mar(rng, _rows(rng, 25_000, weights, means, covs), 0.05), 25_000)
    state = s.drift_state()
    assert state["baseline"] is not None
    shares = state["baseline_info"]["missing_share"]
    assert shares and max(max(v) for v in shares.values()) > 0.02   # gaps were seen
    assert s.alerts() == []
    assert state["bounds"]["entries"] == {}


def test_a_feature_missing_from_one_segments_rows_alerts_within_three_windows(stream):
    weights, means, covs = _truth()
    comp, feature = 2, 3
    rng = np.random.default_rng(32)
    s = stream()
    change = 60_000
    s.feed(_mar(rng, _rows(rng, change, weights, means, covs), 0.02), 10_000)
    segment = s.segment_of(means[comp])
    after = _mar(rng, _rows(rng, 40_000, weights, means, covs), 0.02)
    # the component's rows: nearest true mean over the observed features
    dist = np.nansum((after[:, None, :] - means[None]) ** 2, axis=2)
    mine = np.flatnonzero(np.argmin(dist, axis=1) == comp)
    drop = mine[rng.random(mine.size) < 0.6]
    after[drop, feature] = np.nan
    s.feed(after, 10_000)
    alert = _first_raised(s.alerts(), "missing_share")
    assert alert is not None, s.alerts()
    w = s.settings.drift.window_rows
    first_full_window = (change - s.settings.warmup_rows) // w + 1
    windows_after = alert["windows"]["last"] - first_full_window + 1
    print(f"missing-share alert after {windows_after} windows of {w} rows")
    assert windows_after <= 3
    assert alert["segment"] == segment
    assert alert["explanation"]["feature"] == FEATURES[feature]
    assert 0.45 < alert["value"] < 0.75
    assert "missing from" in alert["explanation"]["summary"]


def test_labels_of_rows_with_missing_features(stream, tmp_path):
    weights, means, covs = _truth()
    rng = np.random.default_rng(33)
    s = stream()
    s.feed(_rows(rng, 30_000, weights, means, covs), 30_000)
    X = _rows(rng, 5_000, weights, means, covs)
    hole = rng.random(X.shape) < 0.25
    X[hole] = np.nan
    path = tmp_path / "gappy.parquet"
    pq.write_table(pa.table({f: X[:, j] for j, f in enumerate(FEATURES)}), path)
    r = s.pipeline.process(path, in_inbox=False)
    labels = pq.read_table(r.labels)
    observed = labels.column("observed").to_numpy()
    np.testing.assert_array_equal(observed, D - hole.sum(axis=1))
    segment = labels.column("segment").to_pylist()
    floor = (D + 1) // 2
    # a segment exactly on the rows with at least min_observed features present
    assert [v is not None for v in segment] == (observed >= floor).tolist()
    # unusual compares like with like: the share among rows with gaps is near the
    # configured quantile, not 0 (their marginal densities are higher) nor far above
    unusual = np.array([bool(u) for u in labels.column("unusual").to_pylist()])
    q = s.settings.output.unusual_quantile
    for c in range(floor, D):
        rows = observed == c
        assert rows.sum() > 300
        assert unusual[rows].mean() < 4 * q + 0.01
    gappy = (observed >= floor) & (observed < D)
    assert 0.2 * q < unusual[gappy].mean() < 3 * q
    extra = s.pipeline.state.extra
    by = extra["unusual_below_observed"]
    assert by[D] == extra["unusual_below"] and all(by[c] is not None for c in range(floor, D))


def test_recovery_from_missing_values_against_the_complete_data_fit():
    # scripts/missing_recovery.py at a quarter of its size: K=4, D=6, 100,000 rows, 20%
    # of values missing; reference scikit-learn GaussianMixture on the rows complete,
    # components matched by scipy.optimize.linear_sum_assignment
    from scripts.missing_recovery import run

    r = run(100_000, out=lambda *a: None)
    mean_err, sd_err, gap = r[("MCAR", "EM with missing data")]
    assert mean_err <= 0.05 and sd_err <= 0.10 and abs(gap) <= 0.02, r
    # missing at random given feature 0: dropping the incomplete rows (the old way)
    # is worse on held-out complete rows by at least 0.05 nats/row
    assert r[("MAR", "EM with missing data")][2] - r[("MAR", "incomplete rows dropped")][2] \
        >= 0.05, r


def test_warm_up_fits_on_complete_rows_and_says_when_it_waits_for_them(stream, caplog):
    weights, means, covs = _truth()
    rng = np.random.default_rng(34)
    s = stream(warmup_rows=2000)
    X = _rows(rng, 3000, weights, means, covs)
    X[rng.random(len(X)) < 0.6, 1] = np.nan            # 60% of the rows miss x1
    with caplog.at_level("WARNING", logger="shoal"):
        s.feed(X, 3000)
    assert s.pipeline.state.mixture is None             # ~1,200 complete rows of 2,000
    assert "warmup_waiting_for_complete_rows" in [r.message for r in caplog.records]
    Y = _rows(rng, 3000, weights, means, covs)
    Y[rng.random(len(Y)) < 0.6, 2] = np.nan
    path = s.folder / "second.parquet"
    pq.write_table(pa.table({f: Y[:, j] for j, f in enumerate(FEATURES)}), path)
    r = s.pipeline.process(path, in_inbox=False)
    model = s.pipeline.state.mixture
    assert model is not None and np.all(np.isfinite(model.means))
    labels = pq.read_table(r.labels)
    # every row of the input that made the model has a segment, gaps or not
    assert labels.column("segment").null_count == 0
    assert (labels.column("observed").to_numpy() == D - 1).sum() > 1500


def test_explanations_name_the_features_missing_from_most_rows():
    from shoal.daemon.segments.missing_drift import missing_note
    info = {"missing": {"shares": [0.0, 0.72, 0.5, 0.51]}}
    assert missing_note(info, ["a", "b", "c", "d"]) == \
        "mostly missing in the window: b (72%), d (51%)"
    assert missing_note({"missing": {"shares": [0.1, 0.5]}}, ["a", "b"]) is None
    assert missing_note({}, ["a"]) is None
