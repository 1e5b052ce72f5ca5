"""Drift statistics against a baseline, their noise levels (checked by simulation), bounds."""

import json
import math

import numpy as np
import pytest

from shoal.core import Mixture, ModelError
from shoal.core.drift_noise import spread_variance
from shoal.core.drift import (
    WHOLE_MODEL,
    Baseline,
    evaluate_bounds,
    explain,
    mean_shift_noise,
    spread_noise,
    weight_noise,
)

# A 3-feature, 3-segment mixture in awkward units (synthetic).
WEIGHTS = np.array([0.5, 0.3, 0.2])
MEANS = np.array([[100.0, -5.0, 0.02], [130.0, 5.0, 0.00], [70.0, 0.0, 0.05]])
COV = np.array([[16.0, 1.2, 0.004], [1.2, 1.0, 0.001], [0.004, 0.001, 0.0001]])
COVS = np.array([COV, 0.5 * COV, 2.0 * COV])
CENTER = np.array([100.0, 0.0, 0.02])
SCALE = np.array([10.0, 2.0, 0.01])


def _mixture(weights=WEIGHTS, means=MEANS, covs=COVS, ids=None, n_eff=1.0e4, covariance="full"):
    return Mixture.from_parameters(
        weights, means, covs, covariance=covariance, center=CENTER, scale=SCALE,
        n_eff=n_eff, ids=ids, reg_covar=0.0, prior_weight=0.0,
    )


def _rows(rng, n, weights=WEIGHTS, means=MEANS, covs=COVS):
    labels = rng.choice(len(weights), size=n, p=weights)
    chol = np.linalg.cholesky(covs)
    return means[labels] + np.einsum("nde,ne->nd", chol[labels], rng.normal(size=(n, 3)))


# ---------------------------------------------------------------------------- baseline


def test_reference_snapshot_and_json_round_trip():
    mixture = _mixture(n_eff=2000.0)
    ref = Baseline.from_mixture(mixture, log_density=-4.25)
    np.testing.assert_allclose(ref.means, MEANS, rtol=1e-12)
    np.testing.assert_allclose(ref.covariances, COVS, rtol=1e-10)
    np.testing.assert_allclose(ref.n_eff, WEIGHTS * 2000.0)
    assert ref.total_n_eff == pytest.approx(2000.0)
    back = Baseline.from_dict(json.loads(json.dumps(ref.to_dict())))
    for name in ("ids", "weights", "means", "covariances", "n_eff"):
        np.testing.assert_array_equal(getattr(back, name), getattr(ref, name))
    assert (back.log_density, back.covariance) == (-4.25, "full")
    exact = Baseline.from_dict(dict(ref.to_dict(), n_eff=[None] * 3, log_density=None))
    assert np.all(np.isposinf(exact.n_eff)) and math.isnan(exact.log_density)
    with pytest.raises(ModelError, match="baseline lacks"):
        Baseline.from_dict({"format": 1, "ids": []})


def test_reference_adopts_a_born_segment_and_drops_a_retired_one():
    ref = Baseline.from_mixture(_mixture())
    later = _mixture(weights=[0.4, 0.3, 0.2, 0.1],
                     means=np.vstack([MEANS + 1.0, [[0.0, 0.0, 0.0]]]),
                     covs=np.concatenate([COVS, COVS[:1]]), ids=[0, 1, 2, 5])
    adopted = ref.without([2]).adopt(later, [5])
    assert adopted.ids.tolist() == [0, 1, 5]
    np.testing.assert_allclose(adopted.means[:2], MEANS[:2])          # kept
    np.testing.assert_allclose(adopted.means[2], [0.0, 0.0, 0.0], atol=1e-12)


# ------------------------------------------------------------ statistics, direct values


# ------------------------------------------------------------- noise levels, simulated
#
# Each formula (module notes of shoal.core.drift) is checked against the spread of the
# statistic over many seeded simulated estimates from Gaussian rows. Tolerances are a
# few Monte-Carlo standard errors of the simulated spread plus the formula's own
# asymptotic error, stated beside each check.

SIGMA = np.array([[2.0, 0.5, 0.0, 0.3], [0.5, 1.0, 0.2, 0.0],
                  [0.0, 0.2, 0.7, 0.1], [0.3, 0.0, 0.1, 1.5]])


def _samples(seed, reps, n, cov=SIGMA):
    rng = np.random.default_rng(seed)
    return rng.normal(size=(reps, n, cov.shape[0])) @ np.linalg.cholesky(cov).T


def _ml_covariances(X):
    centred = X - X.mean(axis=1, keepdims=True)
    return np.einsum("rni,rnj->rij", centred, centred) / X.shape[1]


def test_mean_shift_noise_is_the_rms_shift_of_a_sample_mean():
    # exact: n d^2 ~ chi2(D). rms over 2,000 reps has relative sd ~ 1 / sqrt(2 * 2000 * D / 2)
    X = _samples(seed=1, reps=2000, n=50)
    d = np.sqrt(np.einsum("ri,ij,rj->r", X.mean(axis=1), np.linalg.inv(SIGMA), X.mean(axis=1)))
    assert np.sqrt(np.mean(d**2)) == pytest.approx(mean_shift_noise(50, 4), rel=0.05)
    # two independent estimates (50 and 150 rows): variances add
    Y = _samples(seed=2, reps=2000, n=150)
    diff = X.mean(axis=1) - Y.mean(axis=1)
    d2 = np.einsum("ri,ij,rj->r", diff, np.linalg.inv(SIGMA), diff)
    assert np.sqrt(np.mean(d2)) == pytest.approx(mean_shift_noise(50, 4, 150), rel=0.05)


@pytest.mark.parametrize("covariance", ["full", "diag", "spherical"])
def test_spread_noise_is_the_sd_of_the_log_generalised_variance(covariance):
    # exact (Wishart / chi-square log-moments); the sd of 3,000 draws is within ~1.3%
    # of the truth, so 6% is over 4 standard errors.
    n, cov = 30, SIGMA if covariance == "full" else np.diag(np.diag(SIGMA))
    if covariance == "spherical":
        cov = np.eye(4) * 1.3
    X = _samples(seed=3, reps=3000, n=n, cov=cov)
    S = _ml_covariances(X)
    if covariance == "full":
        log_gv = np.linalg.slogdet(S)[1]
    elif covariance == "diag":
        log_gv = np.sum(np.log(np.diagonal(S, axis1=1, axis2=2)), axis=1)
    else:
        log_gv = 4 * np.log(np.trace(S, axis1=1, axis2=2) / 4)
    assert np.std(log_gv) == pytest.approx(spread_noise(n, 4, covariance), rel=0.06)
    # the leading term 2D/n is a fair summary of it
    assert spread_noise(n, 4, covariance) == pytest.approx(np.sqrt(8 / n), rel=0.3)


@pytest.mark.parametrize("d", [1, 2, 5, 16])
def test_full_spread_variance_is_the_wishart_sum_of_trigammas(d):
    # Var log|S| of a Wishart estimate from n rows is sum_{i=1}^{D} trigamma((n - i) / 2)
    # (the log-determinant is a sum of independent log chi-squares; Anderson,
    # An Introduction to Multivariate Statistical Analysis, the Bartlett decomposition,
    # from memory); scipy's polygamma(1, x) term by term is the reference.
    from scipy import special
    n = np.array([d + 0.5, d + 3.0, 57.25, 4096.0, 2.5e6])
    ref = np.array([sum(special.polygamma(1, (x - i) / 2.0) for i in range(1, d + 1))
                    for x in n])
    assert np.allclose(spread_variance(n, d, "full"), ref, rtol=1e-12)


def test_weight_noise_is_the_binomial_sd_of_a_share():
    rng = np.random.default_rng(5)
    shares = rng.binomial(800, 0.2, size=5000) / 800
    # sd of 5,000 binomial shares is within ~1% of the truth; 4% allowed
    assert np.sqrt(np.mean((shares - 0.2) ** 2)) == pytest.approx(weight_noise(0.2, 800), rel=0.04)


# ------------------------------------------------------------------- detection, explain


def test_explain_ranks_by_shift_in_reference_sds_not_data_units():
    ref = Baseline.from_mixture(_mixture())
    moved = MEANS[0] + np.array([4.0, 0.5, 0.03])   # 1 sd, 0.5 sd, 3 sd
    rows = explain(ref, 0, moved)
    assert [r["index"] for r in rows] == [2, 0, 1]
    np.testing.assert_allclose([r["shift_sd"] for r in rows], [3.0, 1.0, 0.5])
    assert [r["feature"] for r in explain(ref, 0, moved, top=1)] == ["x2"]
    with pytest.raises(ModelError, match="segment 9 is not in the baseline"):
        explain(ref, 9, moved)


# ------------------------------------------------------------------------------ bounds


def _run(sequence, bounds, **kwargs):
    """Feed ``[(values, noise), ...]`` through evaluate_bounds via JSON; collect events."""
    state, seen = None, []
    for at, (values, noise) in enumerate(sequence):
        state, events = evaluate_bounds(values, noise, bounds, state, at=at, **kwargs)
        state = json.loads(json.dumps(state))
        seen.extend((e["at"], e["segment"], e["statistic"], e["status"]) for e in events)
    return seen, state


def test_a_crossing_must_persist_to_fire_and_come_back_under_to_resolve():
    key = (3, "mean_shift")
    trace = [0.9, 2.0, 2.0, 0.5, 2.0, 2.0, 2.0, 2.5, 1.5, 0.7, 0.7, 1.2, 0.7, 0.7, 0.7, 2.0]
    sequence = [({key: v}, {key: 0.1}) for v in trace]
    events, state = _run(sequence, {"mean_shift": 1.0}, persist=3, resolve_fraction=0.8,
                         resolve_persist=3)
    # two crossings then a dip: nothing; three in a row fire at the third (at=6); 1.5
    # is under neither level; 0.7 twice then 1.2 resets; three times 0.7 clear (at=14)
    assert events == [(6, 3, "mean_shift", "raised"), (14, 3, "mean_shift", "cleared")]
    assert state["entries"]["3"]["mean_shift"]["above"] == 1      # at=15 starts anew


def test_a_crossing_within_the_noise_never_fires():
    key = (1, "weight_change")
    sequence = [({key: 0.2}, {key: 0.1})] * 10
    events, _ = _run(sequence, {"weight_change": 0.1}, noise_multiple=3.0, persist=2)
    assert events == []
    events, _ = _run(sequence, {"weight_change": 0.1}, noise_multiple=1.5, persist=2)
    assert events == [(1, 1, "weight_change", "raised")]


def test_missing_or_unbounded_values_keep_the_state_and_overrides_apply():
    a, b = (0, "hellinger"), (4, "hellinger")
    sequence = [
        ({a: 0.5, b: 0.5}, {}),
        ({a: float("nan")}, {}),                    # no evidence for either
        ({a: 0.5, b: 0.5, (0, "unbounded"): 9.0}, {}),
    ]
    events, state = _run(sequence, {"hellinger": 0.3, (4, "hellinger"): 0.6}, persist=2)
    assert events == [(2, 0, "hellinger", "raised")]        # segment 4's own bound is 0.6
    assert set(state["entries"]) == {"0"} and state["entries"]["0"]["hellinger"]["first_at"] == 0


def test_bounds_are_deterministic_and_leave_the_input_state_alone():
    rng = np.random.default_rng(10)
    keys = [(s, stat) for s in (2, 10, WHOLE_MODEL) for stat in ("mean_shift", "fit_drop")]
    sequence = [({k: float(v) for k, v in zip(keys, rng.uniform(0, 2, len(keys)))}, {})
                for _ in range(40)]
    first, state = _run(sequence, {"mean_shift": 1.0, "fit_drop": 1.0}, persist=2,
                        resolve_persist=2)
    second, _ = _run(sequence, {"mean_shift": 1.0, "fit_drop": 1.0}, persist=2,
                     resolve_persist=2)
    assert first == second and len(first) > 4
    frozen = json.dumps(state, sort_keys=True)
    evaluate_bounds(*sequence[0], {"mean_shift": 1.0, "fit_drop": 1.0}, state)
    assert json.dumps(state, sort_keys=True) == frozen
    # within one evaluation, events come ordered by segment, integer ids (numerically)
    # before named ones, then by statistic
    order = {2: 0, 10: 1, WHOLE_MODEL: 2}
    by_time = {}
    for at, segment, statistic, _ in first:
        by_time.setdefault(at, []).append((order[segment], statistic))
    assert max(len(ranks) for ranks in by_time.values()) >= 3
    assert all(ranks == sorted(ranks) for ranks in by_time.values())
    with pytest.raises(ModelError, match="persist should be a positive integer"):
        evaluate_bounds({}, {}, {}, None, persist=0)


def test_trigamma_is_scipys_polygamma_of_order_one():
    """The drift noise's trigamma (Hurwitz zeta(2, x)) against scipy.special.polygamma(1, x)
    over the arguments it meets (half effective rows, from just above 0 to 10^7)."""
    from scipy import special

    from shoal.core.drift_noise import _trigamma

    x = np.concatenate([np.linspace(0.01, 10, 500), np.geomspace(10, 1e7, 500)])
    np.testing.assert_array_equal(_trigamma(x), special.polygamma(1, x))
