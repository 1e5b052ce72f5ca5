"""Closed-form Gaussian distances and the T^2 test, against outside references."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from scipy.spatial.distance import mahalanobis as scipy_mahalanobis

from shoal.core.distances import (
    GaussianSet,
    pairwise_bhattacharyya,
    bhattacharyya_distance,
    hellinger_distance,
    hotelling_t2_pvalue,
)
from shoal.core.errors import IllConditionedError, ModelError

# Two 3-D Gaussians that differ in mean, scale and orientation.
M0 = np.array([0.0, 1.0, -0.5])
S0 = np.array([[1.0, 0.4, 0.1], [0.4, 2.0, -0.3], [0.1, -0.3, 0.5]])
M1 = np.array([0.6, 0.2, -0.2])
S1 = np.array([[1.5, -0.2, 0.0], [-0.2, 0.8, 0.25], [0.0, 0.25, 0.9]])


def _random_spd(rng, n_features, batch=()):
    a = rng.standard_normal(batch + (n_features, n_features))
    return a @ np.swapaxes(a, -1, -2) + 0.2 * np.eye(n_features)


# ----------------------------------------------------------------- Monte-Carlo references


def test_hellinger_matches_monte_carlo_estimate():
    # BC = integral sqrt(p q) = E_p[sqrt(q(x) / p(x))], estimated from 200,000 draws of
    # p with scipy's logpdf; tolerance 5 standard errors of the sample mean.
    rng = np.random.default_rng(12)
    p, q = stats.multivariate_normal(M0, S0), stats.multivariate_normal(M1, S1)
    x = p.rvs(200_000, random_state=rng)
    root_ratio = np.exp(0.5 * (q.logpdf(x) - p.logpdf(x)))
    estimate = root_ratio.mean()
    standard_error = root_ratio.std(ddof=1) / np.sqrt(x.shape[0])
    # BC = 1 - H^2
    assert abs(1.0 - hellinger_distance(M0, S0, M1, S1) ** 2 - estimate) < 5 * standard_error
    assert hellinger_distance(M0, S0, M1, S1) == pytest.approx(np.sqrt(1.0 - estimate), abs=0.01)


# ----------------------------------------------------------------- closed-form references


def test_bhattacharyya_univariate_closed_form():
    # D_B = (m0-m1)^2 / (4 (v0+v1)) + 0.5 log((v0+v1) / (2 sqrt(v0 v1)))
    # (Bhattacharyya distance between univariate normals, standard result).
    m0, v0, m1, v1 = 1.0, 0.5, -0.5, 2.0
    expected = (m0 - m1) ** 2 / (4 * (v0 + v1)) + 0.5 * np.log((v0 + v1) / (2 * np.sqrt(v0 * v1)))
    assert bhattacharyya_distance([m0], [[v0]], [m1], [[v1]]) == pytest.approx(expected, rel=1e-12)


def test_mahalanobis_matches_scipy():
    # scipy.spatial.distance.mahalanobis takes the inverse covariance explicitly.
    expected = scipy_mahalanobis(M1, M0, np.linalg.inv(S0))
    got = GaussianSet(M0[None], S0[None]).mahalanobis(M1[None], np.array([0]))
    assert got[0] == pytest.approx(expected, rel=1e-12)


def test_log_determinants_match_slogdet_and_scale():
    ref = GaussianSet(np.stack([M0, M1, M0]), np.stack([S0, S1, 2.0 * S0]))
    assert ref.log_det[:2] == pytest.approx([np.linalg.slogdet(S0)[1],
                                             np.linalg.slogdet(S1)[1]], rel=1e-12)
    assert ref.log_det[2] - ref.log_det[0] == pytest.approx(3 * np.log(2.0))
    # Where det overflows, the log-determinant still holds (64 features of variance 1e6).
    big = np.eye(64) * 1e6
    with np.errstate(over="ignore"):
        assert np.isinf(np.linalg.det(big))
    assert GaussianSet(np.zeros((1, 64)), big[None]).log_det[0] == \
        pytest.approx(64 * np.log(1e6))


# ----------------------------------------------------------------- identities and batching


ALL_DISTANCES = [bhattacharyya_distance, hellinger_distance]


@pytest.mark.parametrize("distance", ALL_DISTANCES)
def test_batched_equals_one_at_a_time_and_broadcasts(distance):
    rng = np.random.default_rng(5)
    means0, covs0 = rng.standard_normal((7, 3)), _random_spd(rng, 3, (7,))
    means1, covs1 = rng.standard_normal((7, 3)), _random_spd(rng, 3, (7,))
    batched = distance(means0, covs0, means1, covs1)
    assert batched.shape == (7,)
    one_by_one = [distance(means0[i], covs0[i], means1[i], covs1[i]) for i in range(7)]
    np.testing.assert_allclose(batched, one_by_one, rtol=1e-12)
    # Every segment against one reference.
    against_one = distance(means0, covs0, means1[0], covs1[0])
    np.testing.assert_allclose(
        against_one, [distance(means0[i], covs0[i], means1[0], covs1[0]) for i in range(7)]
    )


def test_identical_gaussians():
    assert bhattacharyya_distance(M0, S0, M0, S0) == pytest.approx(0.0, abs=1e-12)
    assert hellinger_distance(M0, S0, M0, S0) == pytest.approx(0.0, abs=1e-7)


def test_far_apart_gaussians_have_hellinger_one():
    assert hellinger_distance(M0, S0, M0 + 1e3, S0) == pytest.approx(1.0)


spd_matrices = st.integers(0, 2**32 - 1).map(
    lambda seed: _random_spd(np.random.default_rng(seed), 3)
)
mean_vectors = st.lists(st.floats(-5, 5), min_size=3, max_size=3).map(np.array)


@settings(max_examples=60, deadline=None)
@given(mean_vectors, spd_matrices, mean_vectors, spd_matrices, mean_vectors, spd_matrices)
def test_metric_properties(ma, sa, mb, sb, mc, sc):
    assert 0.0 <= hellinger_distance(ma, sa, mb, sb) <= 1.0
    assert hellinger_distance(ma, sa, mb, sb) == pytest.approx(
        hellinger_distance(mb, sb, ma, sa), abs=1e-12
    )
    # Hellinger is a metric: the triangle inequality holds.
    h = hellinger_distance
    assert h(ma, sa, mb, sb) <= h(ma, sa, mc, sc) + h(mc, sc, mb, sb) + 1e-9


# ----------------------------------------------------------------- validation


def test_validation_messages():
    with pytest.raises(ModelError, match=r"cov1 should have shape \(\.\.\., 3, 3\), got \(2, 2\)"):
        bhattacharyya_distance(M0, S0, M1, np.eye(2))
    with pytest.raises(ModelError, match="mean1 should have 3 features"):
        bhattacharyya_distance(M0, S0, M1[:2], S1)
    with pytest.raises(ModelError, match="symmetric"):
        hellinger_distance(M0, S0 + np.triu(np.ones((3, 3)), 1), M1, S1)
    with pytest.raises(ModelError, match="finite"):
        hellinger_distance(M0 * np.nan, S0, M1, S1)
    singular = np.ones((3, 3))
    with pytest.raises(IllConditionedError, match="reg_covar"):
        bhattacharyya_distance(M0, S0, M1, singular)


# ----------------------------------------------------------------- Kish and Hotelling


@pytest.mark.parametrize("dof, expected", [(1, 3.841), (2, 5.991), (3, 7.815), (5, 11.070)])
def test_chi_square_p_values_at_the_table_points(dof, expected):
    # Upper 5% points of chi-square (NIST/SEMATECH e-Handbook of Statistical Methods,
    # table 1.3.6.7.4; from memory, and equal to scipy.stats.chi2.isf to 4 digits).
    assert hotelling_t2_pvalue(expected, dof) == pytest.approx(stats.chi2.sf(expected, dof))
    assert hotelling_t2_pvalue(expected, dof) == pytest.approx(0.05, abs=1e-4)


def test_t2_with_kish_weights_has_its_nominal_false_alarm_rate():
    # Weighted batch means of independent rows with a known covariance: with Kish's
    # n_eff, T^2 is exactly chi-square(p), so at alpha = 0.05 about 5% of 20,000
    # simulated batches exceed the critical value. Tolerance: 4.5 binomial standard
    # errors (sqrt(0.05 * 0.95 / 20000) = 0.0015). Ignoring the weights (n_eff = n)
    # inflates the rate, which the second check shows.
    rng = np.random.default_rng(31)
    n_batches, n_rows, p = 20_000, 40, 3
    chol = np.linalg.cholesky(S0)
    x = M0 + rng.standard_normal((n_batches, n_rows, p)) @ chol.T
    weights = rng.uniform(0.0, 1.0, (n_batches, n_rows)) ** 3  # very uneven
    mean = np.einsum("bn,bnp->bp", weights, x) / weights.sum(axis=1, keepdims=True)
    n_eff = weights.sum(axis=1) ** 2 / (weights * weights).sum(axis=1)   # Kish
    squared = GaussianSet(M0[None], S0[None]).mahalanobis(mean, np.zeros(n_batches, int)) ** 2
    rate = np.mean(hotelling_t2_pvalue(n_eff * squared, p) < 0.05)
    assert abs(rate - 0.05) < 4.5 * np.sqrt(0.05 * 0.95 / n_batches)
    naive_rate = np.mean(hotelling_t2_pvalue(n_rows * squared, p) < 0.05)
    assert naive_rate > 0.2


def _random_gaussians(rng, k, d, ridge=0.3):
    """k seeded random Gaussians in d dimensions (synthetic test data)."""
    A = rng.normal(0.0, 0.5, (k, d, d))
    return rng.normal(0.0, 2.0, (k, d)), A @ np.swapaxes(A, 1, 2) + ridge * np.eye(d)


def test_pairwise_bhattacharyya_equals_the_pair_by_pair_distance():
    # The K-at-once form factorises each Gaussian once and each unordered pair once;
    # it must give what bhattacharyya_distance gives pair by pair.
    k = 6
    means, covs = _random_gaussians(np.random.default_rng(41), k, 5)
    got = pairwise_bhattacharyya(means, covs)
    for i in range(k):
        for j in range(k):
            want = 0.0 if i == j else bhattacharyya_distance(means[i], covs[i], means[j], covs[j])
            assert got[i, j] == pytest.approx(want, rel=1e-12, abs=1e-14)
    assert pairwise_bhattacharyya(means[:1], covs[:1]).shape == (1, 1)


def test_the_trace_bound_never_exceeds_the_bhattacharyya_distance():
    # D_B >= |d|^2 / (4 (tr S0 + tr S1)) (derived in bhattacharyya_lower_bound's
    # docstring); checked against the exact pairwise distances on random sets, close
    # and far, and a subset of pairs computed alone equals the same pairs of the whole.
    from shoal.core.distances import bhattacharyya_lower_bound

    rng = np.random.default_rng(43)
    for trial in range(30):
        k, d = int(rng.integers(2, 9)), int(rng.integers(1, 7))
        means, covs = _random_gaussians(rng, k, d, ridge=float(rng.uniform(0.01, 2.0)))
        means *= rng.uniform(0.01, 3.0)
        exact = pairwise_bhattacharyya(means, covs)
        rows, cols = np.triu_indices(k, k=1)
        bound = bhattacharyya_lower_bound(means, covs)
        assert np.all(bound <= exact[rows, cols] * (1 + 1e-12) + 1e-15)
        pick = rng.uniform(size=rows.size) < 0.5
        part = pairwise_bhattacharyya(means, covs, pick)
        np.testing.assert_array_equal(part[rows[pick], cols[pick]], exact[rows[pick], cols[pick]])
        assert np.all(np.isinf(part[rows[~pick], cols[~pick]]))
        np.testing.assert_array_equal(part, part.T)


def test_gaussian_set_measures_each_mean_against_its_member():
    # scipy's Mahalanobis distance and numpy's slogdet member by member
    rng = np.random.default_rng(42)
    means, covs = _random_gaussians(rng, 5, 4)
    ref = GaussianSet(means, covs)
    index = np.array([3, 0, 0, 4])
    other_means, _ = _random_gaussians(rng, 4, 4, ridge=0.2)
    want = [scipy_mahalanobis(m, means[i], np.linalg.inv(covs[i]))
            for m, i in zip(other_means, index)]
    np.testing.assert_allclose(ref.mahalanobis(other_means, index), want, rtol=1e-12)
    np.testing.assert_allclose(ref.log_det, np.linalg.slogdet(covs)[1], rtol=1e-12)
    with pytest.raises(ModelError):
        GaussianSet(means, covs[:, :3, :3])


def test_stacked_triangular_solves_match_lapack_matrix_by_matrix():
    """The stacked forward substitution against scipy.linalg.solve_triangular (LAPACK
    trtrs) called on each matrix; right-hand sides shared by the stack or one each."""
    from scipy.linalg import solve_triangular

    from shoal.core.distances import _solve_lower

    rng = np.random.default_rng(21)
    A = rng.normal(size=(5, 3, 6, 6))
    chol = np.linalg.cholesky(A @ np.swapaxes(A, -1, -2) + 6 * np.eye(6))
    for rhs in (rng.normal(size=(5, 3, 6, 2)), rng.normal(size=(6, 4))):
        got = _solve_lower(chol, rhs)
        full = np.broadcast_to(rhs, (5, 3) + rhs.shape[-2:])
        for i in range(5):
            for j in range(3):
                want = solve_triangular(chol[i, j], full[i, j], lower=True)
                np.testing.assert_allclose(got[i, j], want, rtol=1e-12, atol=1e-12)
