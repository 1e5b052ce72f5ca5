"""The warehouse demo scenario: deterministic, cut-invariant, changes where asked,
and separable enough that a 4-component Gaussian mixture recovers its states."""

import numpy as np
import pytest

from shoal.daemon.demo.scenario import (
    FEATURES,
    NEW_STATE,
    START_TIME,
    STATES,
    UNITS,
    Drift,
    NewState,
    demo_changes,
    describe_states,
    drops,
    generate,
)

SEED = 2024


def _matrix(columns):
    return np.column_stack([columns[name] for name in FEATURES])


def _assert_same(a, b):
    assert a.keys() == b.keys()
    for name in a:
        np.testing.assert_array_equal(a[name], b[name], err_msg=name)


def test_same_seed_same_rows_other_seed_other_rows():
    _assert_same(generate(5000, SEED), generate(5000, SEED))
    assert not np.array_equal(generate(500, SEED)["compressor_a"], generate(500, SEED + 1)["compressor_a"])


def test_any_cut_of_the_stream_gives_the_same_rows():
    # Pieces cross the internal 4096-row blocks at odd places.
    drift, new_state = Drift("RU-02", 3000, 2.0), NewState(6000, 0.2)
    whole = generate(12_000, SEED, drift=drift, new_state=new_state)
    sizes = [1, 4094, 4097, 7, 3801]
    pieces, start = [], 0
    for size in sizes:
        pieces.append(generate(size, SEED, start_row=start, drift=drift, new_state=new_state))
        start += size
    joined = {name: np.concatenate([p[name] for p in pieces]) for name in whole}
    _assert_same(joined, whole)
    files = list(drops(4, 3000, SEED, drift=drift, new_state=new_state))
    assert len(files) == 4
    _assert_same({name: np.concatenate([f[name] for f in files]) for name in whole}, whole)


def test_columns_shapes_and_types():
    data = generate(1000, SEED, start_row=16)
    assert list(data) == ["unit_id", "timestamp", *FEATURES, "state"]
    assert all(column.shape == (1000,) for column in data.values())
    for name in FEATURES:
        assert data[name].dtype == np.float64 and np.all(np.isfinite(data[name]))
    assert data["timestamp"].dtype == np.dtype("datetime64[ms]")
    assert data["unit_id"].dtype.kind == "U" and set(data["unit_id"]) == set(UNITS)
    assert set(data["state"]) == set(STATES)
    # Row 16 is minute 2, first unit; each fleet round of 8 rows shares one minute.
    assert data["unit_id"][:8].tolist() == list(UNITS)
    assert data["timestamp"][0] == START_TIME + np.timedelta64(2, "m")
    assert np.all(data["timestamp"][8:] - data["timestamp"][:-8] == np.timedelta64(1, "m"))
    assert data["door_open_s"].min() >= 0.0 and data["door_open_s"].max() <= 60.0
    assert data["fan_rpm"].min() >= 0.0
    empty = generate(0, SEED)
    assert all(column.shape == (0,) for column in empty.values())
    assert empty["timestamp"].dtype == np.dtype("datetime64[ms]")


def test_schedule_gives_the_cycle_shares_exactly():
    # Every unit runs a 360-minute cycle: 30 min defrost, 40 min pull-down. Over a
    # whole number of cycles for all 8 units (2880 rows per cycle) the shares are exact.
    states = generate(5 * 2880, SEED)["state"]
    assert np.mean(states == "defrost") == pytest.approx(30 / 360)
    assert np.mean(states == "pull_down") == pytest.approx(40 / 360)
    door = np.mean(states == "door_traffic")
    assert 0.08 < door < 0.2  # two 15-35 minute episodes per cycle, which may overlap


def test_drift_changes_only_one_units_running_compressor_from_its_row_on():
    start, rate = 4000, 3.0
    plain = generate(10_000, SEED)
    drifted = generate(10_000, SEED, drift=Drift("RU-05", start, rate))
    changed = plain["compressor_a"] != drifted["compressor_a"]
    rows = np.arange(10_000)
    expected_rows = (rows > start) & (plain["unit_id"] == "RU-05") & (plain["state"] != "defrost")
    np.testing.assert_array_equal(changed, expected_rows)
    rise = drifted["compressor_a"] - plain["compressor_a"]
    np.testing.assert_allclose(rise[changed], rate * (rows[changed] - start) / 10_000, rtol=1e-12)
    for name in ("supply_air_c", "return_air_c", "fan_rpm", "door_open_s", "state"):
        np.testing.assert_array_equal(plain[name], drifted[name])


def test_new_state_appears_from_its_row_in_its_share():
    start, share = 10_000, 0.15
    plain = generate(40_000, SEED)
    data = generate(40_000, SEED, new_state=NewState(start, share))
    is_new = data["state"] == NEW_STATE
    assert not is_new[:start].any()
    for name in data:
        np.testing.assert_array_equal(data[name][:start], plain[name][:start])
    # Binomial share: 30,000 rows, standard error sqrt(0.15 * 0.85 / 30000) = 0.002.
    assert abs(is_new[start:].mean() - share) < 5 * np.sqrt(share * (1 - share) / 30_000)
    truth = describe_states()[NEW_STATE]
    new_rows = _matrix(data)[is_new]
    assert new_rows[:, FEATURES.index("fan_rpm")].mean() == pytest.approx(truth["fan_rpm"], rel=0.01)
    assert truth["fan_rpm"] < describe_states()["holding"]["fan_rpm"] - 200


def test_describe_states_gives_the_mean_of_the_generated_readings():
    # Per state and feature, the sample mean of 200,000 rows lies within 5 standard
    # errors (state sd / sqrt(rows in state)) of the stated mean. Door time and the
    # stopped fan are reflected at 0, so their means sit above the Gaussian's centre
    # (defrost fan 10 rpm -> 10.24): the check covers that correction.
    data = generate(200_000, SEED, new_state=NewState(0, 0.05))
    X = _matrix(data)
    truth = describe_states()
    assert list(truth) == [*STATES, NEW_STATE]
    assert truth["defrost"]["fan_rpm"] == pytest.approx(10.238, abs=1e-3)
    for state, means in truth.items():
        rows = X[data["state"] == state]
        standard_error = rows.std(axis=0, ddof=1) / np.sqrt(rows.shape[0])
        expected = np.array([means[name] for name in FEATURES])
        assert np.all(np.abs(rows.mean(axis=0) - expected) < 5 * standard_error), state
    assert list(describe_states(include_new_state=False)) == list(STATES)
    assert all(type(v) is float for means in truth.values() for v in means.values())  # JSON-able


def test_gaussian_mixture_recovers_the_four_states():
    # Separability check with scikit-learn's GaussianMixture (a test reference only)
    # on the first 20,000 rows, no drift or new state, standardised by column as
    # shoal's core does. Each recovered mean must lie within 0.2 of that state's
    # standard deviations of a different true state mean in every feature (measured:
    # under 0.05); merging two states or splitting one would be off by several sd.
    from sklearn.metrics import adjusted_rand_score
    from sklearn.mixture import GaussianMixture

    data = generate(20_000, SEED)
    X = _matrix(data)
    centre, scale = X.mean(axis=0), X.std(axis=0)
    fit = GaussianMixture(4, covariance_type="full", random_state=0).fit((X - centre) / scale)
    recovered = fit.means_ * scale + centre
    truth = describe_states(include_new_state=False)
    true_means = np.array([[truth[s][name] for name in FEATURES] for s in STATES])
    state_sd = np.array([_matrix(data)[data["state"] == s].std(axis=0) for s in STATES])
    matched = []
    for mean in recovered:
        offsets = np.max(np.abs(mean - true_means) / state_sd, axis=1)
        best = int(np.argmin(offsets))
        assert offsets[best] < 0.2, (mean, STATES[best], offsets[best])
        matched.append(best)
    assert sorted(matched) == [0, 1, 2, 3]
    assert adjusted_rand_score(data["state"], fit.predict((X - centre) / scale)) > 0.98


def test_demo_changes_place_the_drift_and_new_state():
    drift, new_state = demo_changes(100_000, rise_a=8.0)
    assert (drift.start_row, new_state.start_row) == (40_000, 70_000)
    assert drift.amps_per_10k_rows * (100_000 - drift.start_row) / 10_000 == pytest.approx(8.0)
    assert drift.unit in UNITS and 0 < new_state.share < 1


def test_bad_arguments_are_refused():
    with pytest.raises(ValueError, match="drift unit should be one of"):
        Drift("RU-99", 0, 1.0)
    with pytest.raises(ValueError, match="share"):
        NewState(0, 1.5)
    with pytest.raises(ValueError, match="n_rows"):
        generate(-1, SEED)
    with pytest.raises(ValueError, match="seed"):
        generate(10, -3)
