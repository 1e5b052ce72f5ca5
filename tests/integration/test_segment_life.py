"""Segments with a life in the service: births, retirements and merges, and stable labels.

A new group of 5% of the rows is born as a segment within 20,000 rows, its mean within
0.5 sd of the truth, old ids and labels unchanged; a group that stops appearing retires
after the configured span, no other id changes; two groups drifting into each other
merge once their overlap passes the bound (the merged parameters are the statistics-sum
of the two, checked against a direct computation from the checkpoint before the merge);
with no lifecycle event, labels of a fixed probe set agree between consecutive model
versions (adjusted Rand index >= 0.99 over 100 versions). 2,000,000 stationary rows
with no event are checked in tests/integration/test_drift_alerts.py's stationary run, the demo's
ice build-up born in tests/e2e/test_alert_cli.py's demo run.

Streams are the seeded K=6, D=5 mixture of tests/support/drift_stream.py, fed as Parquet
drops through the real pipeline in-process.
"""
import numpy as np
import pytest
from sklearn.metrics import adjusted_rand_score

from shoal.core import Mixture
from shoal.daemon.ingest.pipeline import Pipeline
from shoal.daemon.views.summary import format_segments, segment_summary

from drift_stream import D, rows as _rows, truth as _truth, stream  # noqa: F401 (stream: a fixture)


def _events(s, status=None):
    return [a for a in s.alerts() if a.get("kind") == "lifecycle"
            and (status is None or a["status"] == status)]


def _mahalanobis(x, mean, cov):
    diff = np.asarray(x) - mean
    return float(np.sqrt(diff @ np.linalg.solve(cov, diff)))


NEW_MEAN_OFFSET = 8.0          # the new group sits this far past the largest true mean
NEW_SHARE = 0.05
CHANGE_ROW = 40_000            # stream row where the new group starts (warm-up included)


def test_new_group_is_born_within_20000_rows_and_old_labels_stay(stream):
    weights, means, covs = _truth()
    new_mean = means.max(axis=0) + NEW_MEAN_OFFSET
    rng = np.random.default_rng(21)
    new_cov = np.eye(D) * 0.5 + 0.2               # correlated, sd 0.84 per feature
    s = stream()
    s.feed(_rows(rng, CHANGE_ROW, weights, means, covs), 10_000)
    before = s.pipeline.state.mixture
    probe = _rows(np.random.default_rng(99), 5000, weights, means, covs)   # old groups only
    labels_before = before.score(probe).segment

    X = _rows(rng, 40_000, weights, means, covs)
    on = rng.random(len(X)) < NEW_SHARE
    X[on] = rng.multivariate_normal(new_mean, new_cov, int(on.sum()))
    s.feed(X, 10_000)

    born = _events(s, "born")
    assert len(born) == 1, [(a["status"], a["segment"]) for a in _events(s)]
    event = born[0]
    delay = event["rows"]["first"] - CHANGE_ROW
    error_at_birth = _mahalanobis(list(event["explanation"]["mean"].values()), new_mean, new_cov)
    after = s.pipeline.state.mixture
    k = int(np.flatnonzero(after.ids == event["segment"])[0])
    error_now = _mahalanobis(after.data_means()[k], new_mean, new_cov)
    print(f"born {delay} rows after the new group appeared; mean off by {error_at_birth:.3f} "
          f"sd at birth, {error_now:.3f} sd 40,000 rows on; weight {after.weights[k]:.3f}")
    assert 0 < delay <= 20_000
    assert error_at_birth <= 0.5 and error_now <= 0.5
    # a new id, never used before; the old ones unchanged, their rows labelled as before
    assert event["segment"] == before.next_id
    assert after.ids.tolist() == before.ids.tolist() + [event["segment"]]
    # settled (lifecycle.settle_rows after birth): it joined the drift baseline, the
    # old segments kept theirs
    ref = s.drift_state()["baseline"]
    assert ref["ids"] == before.ids.tolist() + [event["segment"]]
    assert _mahalanobis(ref["means"][-1], new_mean, new_cov) <= 0.5
    agree = float(np.mean(after.score(probe).segment == labels_before))
    print(f"probe rows of the old groups labelled as before: {agree:.4f}")
    assert agree >= 0.99
    # recorded with its model version, and the summary says where it sits in data units
    history = [h for h in s.store.history() if h["event"]]
    assert [(h["segment"], h["version"]) for h in history] == \
        [(event["segment"], event["model_version"]["first"])]
    assert event["explanation"]["summary"].startswith(f"segment {event['segment']} born")
    assert "x0 " in event["explanation"]["summary"]


def test_group_that_stops_appearing_retires_after_the_span(stream):
    weights, means, covs = _truth()
    comp = 3                                       # weight 0.051
    rng = np.random.default_rng(22)
    span = 12_000
    s = stream(half_life_rows=8000, lifecycle={"retire_weight": 0.01, "retire_rows": span})
    s.feed(_rows(rng, 30_000, weights, means, covs), 10_000)
    before = s.pipeline.state.mixture
    segment = s.segment_of(means[comp])
    gone = weights.copy()
    gone[comp] = 0.0
    s.feed(_rows(rng, 70_000, gone, means, covs), 10_000)
    events = _events(s)
    assert [(a["status"], a["segment"]) for a in events] == [("retired", segment)]
    event = events[0]
    # its fading raised a weight_change alert; the retirement cleared it
    raised = {a["id"] for a in s.alerts() if a["status"] == "raised"
             and a["segment"] == segment}
    cleared = {a["id"] for a in s.alerts() if a["status"] == "cleared"
                and a.get("cleared_by") == "retired"}
    assert raised and raised == cleared
    assert not [k for k in s.drift_state()["open"] if k.startswith(f"{segment}|")]
    stop_row = 30_000
    under = event["explanation"]["under_since_row"]
    print(f"weight under the floor {under - stop_row} rows after the group stopped; retired "
          f"{event['rows']['first'] - under} rows later (span {span})")
    assert event["rows"]["first"] - under >= span
    assert under > stop_row
    after = s.pipeline.state.mixture
    assert after.ids.tolist() == [i for i in before.ids.tolist() if i != segment]
    # the drift baseline no longer holds it; the history records it with the version
    assert segment not in s.drift_state()["baseline"]["ids"]
    rows = [h for h in s.store.history(segment) if h["event"]]
    assert len(rows) == 1 and rows[0]["event"].startswith("retired")
    assert rows[0]["version"] == event["model_version"]["first"]
    # `shoal segments --all` lists it apart from the current ones; without --all it is gone
    shown = segment_summary(s.store, s.settings, include_gone=True)
    assert [g["id"] for g in shown["gone"]] == [segment]
    assert shown["gone"][0]["ended_version"] == event["model_version"]["first"]
    table = format_segments(shown)
    assert f"  {segment}  retired at row {event['rows']['first']}" in table
    assert "no longer" not in format_segments(segment_summary(s.store, s.settings))


def _segment_near(s, true_mean):
    """The model's segment whose mean is nearest a true component mean."""
    mixture = s.pipeline.state.mixture
    return int(mixture.ids[np.argmin(np.linalg.norm(mixture.data_means() - true_mean, axis=1))])


def _stats_sum(mixture: Mixture, a: int, b: int):
    """Weight, mean and sds (data units) of the union of two components, straight from
    their sufficient statistics: s0 and s1 and s2 added, then moments."""
    ia, ib = (int(np.flatnonzero(mixture.ids == i)[0]) for i in (a, b))
    s0 = mixture.s0[ia] + mixture.s0[ib]
    s1 = mixture.s1[ia] + mixture.s1[ib]
    s2 = mixture.s2[ia] + mixture.s2[ib]
    zmean = s1 / s0
    zcov = s2 / s0 - np.outer(zmean, zmean)
    weight = s0 / mixture.s0.sum()
    mean = mixture.center + mixture.scale * zmean
    sd = np.sqrt(np.diag(zcov)) * mixture.scale
    return weight, mean, sd


def test_groups_drifting_into_each_other_merge_as_the_sum_of_their_statistics(stream):
    weights, means, covs = _truth()
    a, b = 2, 4
    rng = np.random.default_rng(23)
    # drops end on decision points (warm-up + multiples of check_rows), so the merge
    # is decided at the start of an input, on the model of the previous checkpoint
    s = stream(half_life_rows=10_000, drift={"enabled": False})
    first = s.settings.warmup_rows + 6 * s.settings.lifecycle.check_rows
    s.feed(_rows(rng, first, weights, means, covs), first)
    older, newer = sorted((_segment_near(s, means[a]), _segment_near(s, means[b])))
    midpoint = 0.5 * (means[a] + means[b])
    version_rows = s.settings.lifecycle.check_rows
    for step in range(1, 41):
        t = min(step / 12, 1.0)
        moved = means.copy()
        moved[a] = means[a] + t * (midpoint - means[a])
        moved[b] = means[b] + t * (midpoint - means[b])
        s.feed(_rows(rng, version_rows, weights, moved, covs), version_rows)
        if _events(s):
            break
    events = _events(s)
    assert [(e["status"], e["segment"]) for e in events] == [("merged", newer)], events
    event = events[0]
    info = event["explanation"]
    assert info["into"] == older and info["measure"] == "hellinger"
    assert info["distance"] < s.settings.lifecycle.merge_distance
    version = event["model_version"]["first"]
    cp = s.store.checkpoint(version - 1)
    assert cp.meta["n_rows"] % s.settings.lifecycle.check_rows == 0
    premerge = Mixture.from_state(cp.arrays, cp.meta)
    weight, mean, sd = _stats_sum(premerge, older, newer)
    # the mean and weight are exact; the sds carry the covariance prior's shrinkage
    # (prior_weight rows of identity against the effective rows) and reg_covar
    assert info["weight"] == pytest.approx(weight, rel=1e-9)
    np.testing.assert_allclose(list(info["mean"].values()), mean, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(list(info["spread"].values()), sd, rtol=1e-3)
    after = s.pipeline.state.mixture
    assert newer not in after.ids.tolist() and older in after.ids.tolist()
    assert after.next_id == premerge.next_id                 # ids are never reused
    # the merged segment sits on the one group now there
    k = int(np.flatnonzero(after.ids == older)[0])
    print(f"merged at row {event['rows']['first']} at distance {info['distance']:.3f}; "
          f"merged weight {info['weight']:.3f} (true {weights[a] + weights[b]:.3f})")
    assert _mahalanobis(after.data_means()[k], midpoint, covs[a] + covs[b]) < 1.0


def test_labels_of_a_probe_set_agree_between_consecutive_versions(stream):
    weights, means, covs = _truth()
    rng = np.random.default_rng(24)
    probe = _rows(np.random.default_rng(98), 3000, weights, means, covs)
    s = stream(drift={"enabled": False})
    s.feed(_rows(rng, 10_000, weights, means, covs), 10_000)
    previous = s.pipeline.state.mixture.score(probe).segment
    scores = []
    for _ in range(100):
        s.feed(_rows(rng, 3000, weights, means, covs), 3000)
        labels = s.pipeline.state.mixture.score(probe).segment
        scores.append(adjusted_rand_score(previous, labels))   # sklearn.metrics
        previous = labels
    assert s.pipeline.state.version == 101
    assert _events(s) == []
    print(f"adjusted Rand index between consecutive versions: min {min(scores):.4f}, "
          f"mean {np.mean(scores):.4f}")
    assert min(scores) >= 0.99


def test_births_do_not_depend_on_how_the_stream_is_cut(stream):
    # Decision points sit on multiples of check_rows learned rows and pieces stop at
    # refresh points, so other drop sizes give the same events at the same rows; the
    # pool and the bookkeeping are committed with the model, so a restart does too.
    weights, means, covs = _truth()
    rng = np.random.default_rng(25)
    X = _rows(rng, 36_000, weights, means, covs)
    late = np.arange(len(X)) >= 24_000
    on = late & (rng.random(len(X)) < NEW_SHARE)
    X[on] = rng.multivariate_normal(means.max(axis=0) + NEW_MEAN_OFFSET, np.eye(D) * 0.6,
                                    int(on.sum()))
    runs = []
    for drop in (12_000, 5_000):
        s = stream()
        if drop == 5_000:
            # ... and a restart part-way (a new pipeline on the same state store, with
            # rows of the new group in the pool) changes nothing
            s.feed(X[:25_000], drop)
            s.pipeline = Pipeline(s.settings, s.layout, s.store)
            s.feed(X[25_000:], drop)
        else:
            s.feed(X, drop)
        runs.append((_events(s), s.pipeline.state.mixture))
    (events_a, mix_a), (events_b, mix_b) = runs
    assert [(e["status"], e["segment"], e["rows"]) for e in events_a] == \
        [(e["status"], e["segment"], e["rows"]) for e in events_b] != []
    np.testing.assert_allclose(list(events_a[0]["explanation"]["mean"].values()),
                               list(events_b[0]["explanation"]["mean"].values()), rtol=1e-9)
    assert mix_a.ids.tolist() == mix_b.ids.tolist()
    np.testing.assert_allclose(mix_a.data_means(), mix_b.data_means(), rtol=1e-9, atol=1e-9)


def test_lifecycle_settings_are_checked_with_a_message_naming_the_key():
    from shoal.config import ConfigError, parse_config

    with pytest.raises(ConfigError, match=r"lifecycle.birth_rows: expected at most "
                                          r"lifecycle.pool_rows \(100\), found 300"):
        parse_config({"features": ["a"], "lifecycle": {"birth_rows": 300, "pool_rows": 100}})
    with pytest.raises(ConfigError, match="lifecycle.merge_measure: expected one of"):
        parse_config({"features": ["a"], "lifecycle": {"merge_measure": "euclid"}})
    off = parse_config({"features": ["a"], "lifecycle": {"merge_distance": None}})
    assert off.lifecycle.merge_distance is None and off.lifecycle.enabled
