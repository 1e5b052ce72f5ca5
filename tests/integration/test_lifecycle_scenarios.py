"""Lifecycle on randomised seeded scenarios (K 3-6, D 2-8, well-separated components,
smallest weight 8%, ``half_life_rows: 50000``, ``warmup_rows: 5000``, 10,000-row
Parquet drops through the real pipeline; tests/support/_scenarios.py). A few seeds here; the
20- and 50-seed sets are ``scripts/lifecycle_scenarios.py``, which prints a table.
"""
import pytest

import _scenarios


@pytest.mark.parametrize("seed", [0, 3, 9, 12, 15])
def test_a_vanished_segment_retires_within_50000_rows_without_shape_alerts(seed, tmp_path):
    r = _scenarios.vanish(tmp_path, seed)
    print(r)
    assert r["delay"] is not None and 0 < r["delay"] <= 50_000, r
    assert r["shape_alerts"] == [], r


# seeds whose birth, at the first decision point after the group appeared, took a few
# older scattered pool rows with it (mean 1.1-6.4 from the truth, share 0.3-0.5%)
# before the group's figures were trimmed of them; in 62 the group's rows, hard-labelled
# with the nearest segment, made that segment's sample split before the pool held
# enough of them for a birth (a split sample now leaves unexplained rows to the pool)
@pytest.mark.parametrize("seed", [27, 39, 43, 52, 62, 63])
def test_a_born_segment_reports_the_group_that_is_born(seed, tmp_path):
    r = _scenarios.birth(tmp_path, seed)
    print(r)
    assert r["delay"] is not None and 0 < r["delay"] <= 20_000, r
    assert r["error"] <= 0.5, r            # Mahalanobis under the group's true covariance
    assert abs(r["share"] - 0.08) <= 0.03, r
    assert r["other_events"] == [], r


# seeds where, before births were weighed against widening the segment, the tail rows
# of a segment whose spread doubled gave birth to a new segment (3 and 11: an arc of
# the ring of rows such a segment leaves unexplained, in 2 features)
@pytest.mark.parametrize("seed", [0, 3, 4, 9, 11, 12])
def test_a_spread_that_doubles_is_no_birth(seed, tmp_path):
    r = _scenarios.spread(tmp_path, seed)
    print(r)
    assert [e for e in r["events"] if e[0] == "born"] == [], r


@pytest.mark.parametrize("seed", [2, 25, 41])
def test_a_stationary_stream_of_300000_rows_raises_nothing(seed, tmp_path):
    r = _scenarios.stationary(tmp_path, seed)
    assert r["alerts"] == [], r


@pytest.mark.parametrize("seed", [0, 4, 12, 19])
def test_a_segment_over_two_components_splits_into_them(seed, tmp_path):
    # the model starts from the core's warm-up fit with one component fewer
    r = _scenarios.lumped(tmp_path, seed)
    print(r)
    assert r["lumped"] is not None and len(r["lumped"]) == 2, r
    assert r["delay"] is not None and r["delay"] <= 50_000, r
    assert max(r["errors"]) <= 0.2, r     # Mahalanobis under the true covariances
    assert [e[0] for e in r["events"]] == ["split"], r


def test_a_pair_that_split_is_not_merged_back_within_the_cool_down():
    # Two segments closer than merge_distance: merged at a decision point, unless the
    # pair is cooling down after a split (lifecycle.cool_down_rows).
    import numpy as np

    from shoal.config import parse_config
    from shoal.core import Mixture
    from shoal.daemon.segments.segment_life import LifeWatch

    settings = parse_config({"features": ["a", "b"], "segments": 3}, ".")
    m = Mixture.from_parameters([0.4, 0.3, 0.3], [[0.0, 0.0], [0.5, 0.0], [20.0, 0.0]],
                                np.stack([np.eye(2)] * 3))
    n = settings.lifecycle.check_rows
    m = m._evolve(n_rows=n)
    results = {}
    for cooling in (False, True):
        life = LifeWatch(settings, None, version=1, file="")
        life.start(stream_offset=1000)
        if cooling:
            life.state["cool"] = {"0|1": n + 1}
        results[cooling] = life.at_boundary(m).ids.tolist()
    assert results[False] == [0, 2]          # merged: the older id survives
    assert results[True] == [0, 1, 2]        # cooling down: kept apart
