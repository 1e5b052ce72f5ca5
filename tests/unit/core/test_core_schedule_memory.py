"""The memory of the tracking schedule: a row's weight halves after ``half_life_rows``.

The reference is the definition of a half-life under geometric forgetting (Cappé &
Moulines 2009's recursion with a constant step ``eta``: a row keeps ``(1 - eta)^n``
after ``n`` newer rows, so ``h`` rows halve it when ``eta = 1 - 2^(-1/h)``). Each test
measures the half-life on a stream, from the moment something changes, and allows
±20%.
"""

import numpy as np
import pytest

from shoal.core import Mixture, StepSchedule, floor_from_half_life, initialise

N_WARMUP = 5000
WEIGHTS = np.array([0.2, 0.3, 0.25, 0.25])          # the first component vanishes
MEANS = np.array([[0.0, 0.0], [8.0, 0.0], [0.0, 8.0], [8.0, 8.0]])
COV = np.eye(2)


def _rows(rng, n, weights, means):
    comp = rng.choice(len(weights), size=n, p=weights / weights.sum())
    return means[comp] + rng.standard_normal((n, 2)), comp


def _half_life(rows_after, kept):
    """Rows after the change at which ``kept`` (1 at the change) first falls to 1/2,
    interpolated on a log scale between the two measurements around it."""
    kept = np.asarray(kept)
    j = int(np.argmax(kept <= 0.5))
    assert kept[j] <= 0.5, "never halved: the stream is too short"
    if j == 0:
        return float(rows_after[0])
    a, b = np.log(kept[j - 1]), np.log(kept[j])
    t = (np.log(0.5) - a) / (b - a)
    return float(rows_after[j - 1] + t * (rows_after[j] - rows_after[j - 1]))


def _follow(m, rng, half_life, weights, means, tracked):
    """Learn from the changed population in steps of a fortieth of a half-life, for
    1.6 half-lives; the rows after the change at which ``tracked(model)`` halved."""
    step = max(half_life // 40, 250)
    after, values = [], []
    for n in range(step, int(1.6 * half_life) + step, step):
        X, _ = _rows(rng, step, weights, means)
        m, _ = m.learn(X)
        after.append(n)
        values.append(tracked(m))
    return _half_life(after, values)


def _start(half_life, seed):
    """A model warmed up on 5,000 rows of the full mixture, the index of the component
    that will change, and the stream's random state."""
    rng = np.random.default_rng(seed)
    warm, _ = _rows(rng, N_WARMUP, WEIGHTS, MEANS)
    m = initialise(warm, 4, "full", seed=seed, n_init=3,
                   schedule=StepSchedule(half_life_rows=half_life))
    k = int(np.argmin(np.linalg.norm(m.data_means() - MEANS[0], axis=1)))
    return m, k, rng


@pytest.mark.parametrize("half_life", [10_000, 50_000, 200_000])
def test_a_vanished_segment_loses_half_its_weight_in_one_half_life(half_life):
    t0 = 100_000
    m, k, rng = _start(half_life, seed=11)
    gone = WEIGHTS * np.array([0.0, 1.0, 1.0, 1.0])
    X, _ = _rows(rng, t0, WEIGHTS, MEANS)
    m, _ = m.learn(X)
    at_change = m.s0[k]
    assert at_change == pytest.approx(0.2, abs=0.03)
    measured = _follow(m, rng, half_life, gone, MEANS, lambda m: m.s0[k] / at_change)
    assert abs(measured / half_life - 1.0) < 0.2, (half_life, measured)


@pytest.mark.parametrize("half_life", [10_000, 50_000, 200_000])
def test_a_segment_mean_covers_half_a_jump_in_one_half_life(half_life):
    t0 = 100_000
    m, k, rng = _start(half_life, seed=12)
    jumped = MEANS.copy()
    jumped[0] += [1.0, 0.0]            # one sd along the first feature
    X, _ = _rows(rng, t0, WEIGHTS, MEANS)
    m, _ = m.learn(X)
    # the mean read from the statistics between refreshes: s1 / s0, standardised units
    start = m.s1[k, 0] / m.s0[k]
    jump = 1.0 / m.scale[0]
    measured = _follow(m, rng, half_life, WEIGHTS, jumped,
                       lambda m: 1.0 - (m.s1[k, 0] / m.s0[k] - start) / jump)
    assert abs(measured / half_life - 1.0) < 0.2, (half_life, measured)


def _synthetic_stream(schedule, t0, length, chunk, seed):
    """A segment's mass ``s0`` and mean ``s1 / s0`` under the schedule's own row weights,
    with responsibilities drawn as a share of 0.2 of the rows (hard assignments) up to
    row ``t0``, none after it for ``s0_gone``, and a unit jump of the rows' value at
    ``t0`` for the mean. Returns rows after ``t0`` and the two tracked ratios."""
    rng = np.random.default_rng(seed)
    s0 = s0_gone = 0.2
    s1 = 0.0
    at = 0
    after, kept, left = [], [], []
    ref0 = ref_mean = None
    while at < t0 + length:
        n = min(chunk, t0 - at) if at < t0 else chunk
        w, keep = schedule.row_weights(at, n)
        r = (rng.random(n) < 0.2).astype(float)
        x = np.full(n, 1.0 if at >= t0 else 0.0)
        s0 = keep * s0 + w @ r
        s0_gone = keep * s0_gone + (w @ r if at < t0 else 0.0)
        s1 = keep * s1 + w @ (r * x)
        at += n
        if at == t0:
            ref0, ref_mean = s0_gone, s1 / s0
        elif at > t0:
            after.append(at - t0)
            kept.append(s0_gone / ref0)
            left.append(1.0 - (s1 / s0 - ref_mean))
    return np.array(after), np.array(kept), np.array(left)


@pytest.mark.parametrize("half_life", [10_000, 50_000, 200_000])
def test_the_memory_is_the_same_after_two_million_rows(half_life):
    sched = StepSchedule(half_life_rows=half_life).resolved(N_WARMUP)
    after, kept, left = _synthetic_stream(sched, 2_000_000, int(1.6 * half_life),
                                          chunk=max(half_life // 40, 250), seed=13)
    for tracked in (kept, left):
        measured = _half_life(after, tracked)
    assert abs(measured / half_life - 1.0) < 0.2, (half_life, measured)


def test_a_checkpoint_made_under_the_earlier_schedule_is_carried_on(mixture_data):
    # A state as the earlier tracking schedule saved it: the same schedule fields
    # (alpha, i0, half_life_rows), 300,000 rows in, where that schedule's step was
    # (300,000 + i0)^-0.7, seven times the floor.
    X, *_ = mixture_data(3000, 2, 2, seed=14)
    m = initialise(X[:2000], 2, "full", seed=0, n_init=1,
                   schedule=StepSchedule(alpha=0.7, half_life_rows=50_000))
    arrays, meta = m.to_state()
    meta = dict(meta, n_rows=300_000,
                schedule={"alpha": 0.7, "i0": 2000.0 ** (1 / 0.7), "half_life_rows": 50_000})
    old = Mixture.from_state(arrays, meta)
    floor = floor_from_half_life(50_000)
    assert (300_000 + 2000.0 ** (1 / 0.7)) ** -0.7 > 5 * floor
    np.testing.assert_array_equal(old.schedule.steps(old.n_rows, 3), floor)
    # it learns on from its statistics, with the constant step, as one saved now would
    new, _ = old.learn(X[2000:2001])
    r = old.score(X[2000:2001]).resp[0]
    np.testing.assert_allclose(new.s0, (1 - floor) * old.s0 + floor * r, rtol=1e-8)
    assert new.n_rows == 300_001
