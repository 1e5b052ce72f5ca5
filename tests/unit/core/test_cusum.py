"""CUSUM and Page-Hinkley: published average run lengths, a plain reference loop,
and state that survives being cut into pieces and stored as JSON."""

import json

import numpy as np
import pytest

from shoal.core.cusum import (
    Cusum,
    PageHinkley,
    cusum_path,
    cusum_update,
    page_hinkley_update,
)
from shoal.core.errors import ModelError


def _run_lengths(k, h, shift, n_runs, seed, upper_only=False, chunk=256):
    """Run lengths (observations up to and including the first signal) of many
    independent CUSUMs on unit-variance normal input with mean ``shift``, simulated
    side by side: each chunk of steps advances every run that has not yet signalled."""
    rng = np.random.default_rng(seed)
    run_length = np.zeros(n_runs, dtype=np.int64)
    active = np.arange(n_runs)
    upper = np.zeros(n_runs)
    lower = np.zeros(n_runs)
    steps_done = 0
    while active.size:
        z = rng.standard_normal((chunk, active.size)) + shift
        path = cusum_path(z, k, h, upper, lower, reset=False)
        signalled = path.signal > 0 if upper_only else path.signal != 0
        hit = signalled.any(axis=0)
        run_length[active[hit]] = steps_done + np.argmax(signalled, axis=0)[hit] + 1
        active, upper, lower = active[~hit], path.final_upper[~hit], path.final_lower[~hit]
        steps_done += chunk
    return run_length


# Reference: Montgomery, Introduction to Statistical Quality Control (6th ed.,
# Table 9.3, "ARL performance of the tabular CUSUM with k = 1/2 and h = 4 or h = 5";
# table number and edition from memory). Shift 0: 168 (h=4), 465 (h=5); shift 1 sd:
# 8.38 (h=4), 10.4 (h=5). These are the figures of the TWO-SIDED scheme (signal when
# either C+ or C- exceeds h), and they are tested in that form here. The simulation
# confirms it: the two-sided scheme gives 168.9 / 8.49 / 464 / 10.47 (10,000 runs,
# seed 1), while one side alone has an in-control ARL of about 335 at h=4, twice the
# table's figure (see the next test). Under a 1-sd shift the lower side almost never
# signals first, so one- and two-sided out-of-control ARLs agree.
# Tolerance 10% (the acceptance criterion); with 10,000 runs the standard error of
# the mean run length is about 1% of the ARL, so 10% is about 10 standard errors.
@pytest.mark.parametrize(
    "h, shift, published",
    [(4.0, 0.0, 168.0), (4.0, 1.0, 8.38), (5.0, 0.0, 465.0), (5.0, 1.0, 10.4)],
)
def test_two_sided_average_run_length_matches_published_table(h, shift, published):
    run_length = _run_lengths(k=0.5, h=h, shift=shift, n_runs=10_000, seed=1)
    assert abs(run_length.mean() - published) < 0.10 * published


def test_one_sided_in_control_run_length_is_twice_the_two_sided_one():
    # Siegmund's approximation for one side (Siegmund 1985, as given by Montgomery,
    # section on the ARL of the tabular CUSUM; from memory):
    # ARL = (exp(-2 D b) + 2 D b - 1) / (2 D^2), D = shift - k, b = h + 1.166.
    # For a two-sided scheme 1/ARL = 1/ARL+ + 1/ARL-, i.e. half of this when shift = 0.
    k, h = 0.5, 4.0
    d, b = 0.0 - k, h + 1.166
    siegmund = (np.exp(-2 * d * b) + 2 * d * b - 1) / (2 * d * d)  # about 338
    one_sided = _run_lengths(k, h, 0.0, n_runs=10_000, seed=2, upper_only=True).mean()
    assert abs(one_sided - siegmund) < 0.10 * siegmund
    assert abs(one_sided / 2 - 168.0) < 0.10 * 168.0


def _reference_cusum(z, k, h, reset):
    """A plain loop over Python floats, written from the textbook recursion."""
    c_plus = c_minus = 0.0
    alarms, directions = [], []
    for i, value in enumerate(z):
        c_plus = max(0.0, c_plus + value - k)
        c_minus = max(0.0, c_minus - value - k)
        if c_plus > h or c_minus > h:
            alarms.append(i)
            directions.append(1 if c_plus > h else -1)
            if reset:
                c_plus = c_minus = 0.0
    return alarms, directions, c_plus, c_minus


@pytest.mark.parametrize("reset", [True, False])
def test_cusum_update_matches_reference_loop(reset):
    rng = np.random.default_rng(7)
    z = rng.standard_normal(3000) + np.repeat([0.0, 0.8, -0.8, 0.0], 750)
    result = cusum_update(z, k=0.5, h=4.0, reset=reset)
    alarms, directions, c_plus, c_minus = _reference_cusum(z.tolist(), 0.5, 4.0, reset)
    assert len(alarms) > 5
    assert result.alarms.tolist() == alarms
    assert result.directions.tolist() == directions
    assert result.upper == pytest.approx(c_plus) and result.lower == pytest.approx(c_minus)


def test_cusum_small_hand_worked_example():
    # k = 0.5, h = 1.2: C+ goes 0.5, 1.0, 1.5 (> 1.2: signal, reset), 0.5; then the
    # drop of -3 takes C- to 2.5 (signal, reset).
    result = cusum_update([1.0, 1.0, 1.0, 1.0, -3.0], k=0.5, h=1.2)
    assert result.alarms.tolist() == [2, 4]
    assert result.directions.tolist() == [1, -1]
    assert (result.upper, result.lower) == (0.0, 0.0)


def test_cusum_path_runs_independent_series_side_by_side():
    rng = np.random.default_rng(8)
    z = rng.standard_normal((400, 5)) + np.array([0.0, 0.5, 1.0, -1.0, 0.0])
    path = cusum_path(z, k=0.5, h=4.0)
    for j in range(5):
        alone = cusum_update(z[:, j], k=0.5, h=4.0)
        assert np.flatnonzero(path.signal[:, j]).tolist() == alone.alarms.tolist()
        assert path.final_upper[j] == pytest.approx(alone.upper)


def test_cusum_state_carries_across_calls_and_through_json():
    rng = np.random.default_rng(9)
    z = rng.standard_normal(1000) + 0.4
    whole = Cusum(k=0.5, h=4.0)
    all_at_once = whole.update(z).alarms.tolist()
    pieces = Cusum(k=0.5, h=4.0)
    found = []
    for chunk in np.array_split(z, [1, 7, 300, 301, 650]):
        offset = pieces.n_seen
        found += (pieces.update(chunk).alarms + offset).tolist()
        pieces = Cusum.from_dict(json.loads(json.dumps(pieces.to_dict())))
    assert found == all_at_once
    assert pieces == whole


def test_page_hinkley_with_a_fixed_level_is_a_lower_cusum():
    # With a known level, M_t - m_t obeys S_t = max(0, S_{t-1} - (x_t - level + delta)),
    # the lower CUSUM of z = x - level with k = delta.
    rng = np.random.default_rng(10)
    x = 3.0 + rng.standard_normal(2000) - np.linspace(0.0, 2.0, 2000)
    ph = page_hinkley_update(x, delta=0.3, threshold=8.0, level=3.0, reset=False)
    path = cusum_path(x - 3.0, k=0.3, h=8.0, reset=False)
    np.testing.assert_allclose(ph.statistic, path.lower, atol=1e-9)
    assert ph.alarms.tolist() == np.flatnonzero(path.signal == -1).tolist()


def test_page_hinkley_running_mean_detects_a_drop_once():
    # Mean log-density per row of 500 healthy inputs around -4.0 nats, then the fit
    # worsens by 1 nat per row. delta = 0.2 tolerates small dips; threshold 10.
    rng = np.random.default_rng(11)
    x = np.concatenate([-4.0 + 0.3 * rng.standard_normal(500), -5.0 + 0.3 * rng.standard_normal(300)])
    result = page_hinkley_update(x, delta=0.2, threshold=10.0)
    assert result.alarms.size == 1  # after the reset it learns the new level
    assert 500 <= result.alarms[0] < 520
    # A rise in level is not what this test looks for.
    assert page_hinkley_update(-x, delta=0.2, threshold=10.0).alarms.size == 0


def test_page_hinkley_state_carries_across_calls_and_through_json():
    rng = np.random.default_rng(12)
    x = np.concatenate([rng.standard_normal(400), rng.standard_normal(400) - 1.5])
    whole = PageHinkley(delta=0.25, threshold=6.0)
    all_at_once = whole.update(x).alarms.tolist()
    pieces = PageHinkley(delta=0.25, threshold=6.0)
    found, offset = [], 0
    for chunk in np.array_split(x, [3, 399, 400, 650]):
        found += (pieces.update(chunk).alarms + offset).tolist()
        offset += chunk.size
        pieces = PageHinkley.from_dict(json.loads(json.dumps(pieces.to_dict())))
    assert found == all_at_once and len(found) >= 1
    assert pieces.to_dict() == pytest.approx(whole.to_dict())


def test_validation():
    with pytest.raises(ModelError, match="finite"):
        cusum_update([0.0, np.nan])
    with pytest.raises(ModelError, match=r"shape \(n_steps,\)"):
        cusum_update(np.zeros((3, 2)))
    with pytest.raises(ModelError, match="h should be a finite positive"):
        cusum_update([0.0], h=0.0)
    with pytest.raises(ModelError, match="non-negative"):
        cusum_path(np.zeros(3), upper=-1.0)
    with pytest.raises(ModelError, match="threshold"):
        page_hinkley_update([0.0], delta=0.1, threshold=-1.0)
