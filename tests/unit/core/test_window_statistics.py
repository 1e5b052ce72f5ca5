"""One drift window's statistics from its sums (shoal.core.window_statistics), against
direct computations with numpy's weighted average and covariance and scipy's
Mahalanobis distance and standard error of the mean. Seeded synthetic rows."""
from dataclasses import replace

import numpy as np
import pytest
from scipy import stats
from scipy.spatial.distance import mahalanobis

from shoal.core.baseline import Baseline, baseline_from_sums
from shoal.core.distances import GaussianSet
from shoal.core.drift_noise import spread_noise, spread_variance
from shoal.core.window_statistics import (
    WindowSums,
    add_segment_scatter,
    add_segment_variances,
    fit_statistics,
    piece_sums,
    stack_sums,
    window_statistics,
)

K, D, N = 3, 4, 3000


def _window(seed=0):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(N, D)) * np.array([1.0, 2.0, 0.5, 3.0]) + 10.0
    resp = rng.dirichlet(np.ones(K), size=N)            # (N, K)
    center = X.mean(axis=0)
    Xc = X - center
    R = np.ascontiguousarray(resp.T)
    T, Q, M = piece_sums(R, Xc)
    S = np.zeros((K, D, D))
    add_segment_scatter(S, Xc, R, 0.0)
    return X, resp, center, WindowSums(T=T, Q=Q, M=M, S=S)


def _one_window(ref, factors, n_rows, sums, center, **kwargs):
    """One window's statistics: window_statistics of a stack of one."""
    return window_statistics(ref, factors, [n_rows], sums, np.asarray(center)[None], **kwargs)


def _baseline(seed=1):
    rng = np.random.default_rng(seed)
    A = rng.normal(size=(K, D, D)) * 0.3
    covs = A @ np.swapaxes(A, 1, 2) + np.eye(D)
    return Baseline(ids=np.arange(K, dtype=np.int64), weights=np.full(K, 1.0 / K),
                    means=rng.normal(10.0, 0.2, (K, D)), covariances=covs,
                    n_eff=np.full(K, 5000.0), total_n_eff=15000.0, log_density=-7.0)


def test_variances_are_the_diagonals_of_the_scatter_and_of_a_direct_sum():
    rng = np.random.default_rng(2)
    X = rng.normal(size=(500, D))
    R = rng.dirichlet(np.ones(K), size=500).T
    full = np.zeros((K, D, D))
    add_segment_scatter(full, X, R, 0.0)
    diag = np.zeros((K, D, D))
    add_segment_variances(diag, X, R)
    direct = np.einsum("kn,nj->kj", R, X * X)
    assert np.allclose(np.diagonal(diag, axis1=1, axis2=2), direct, rtol=1e-12)
    assert np.allclose(np.diagonal(full, axis1=1, axis2=2), direct, rtol=1e-12)
    assert np.all(diag[:, ~np.eye(D, dtype=bool)] == 0.0)


def test_segment_statistics_match_weighted_moments_and_scipy_mahalanobis():
    X, resp, center, sums = _window()
    ref = _baseline()
    got = _one_window(ref, GaussianSet(ref.means, ref.covariances), N, sums, center,
                             min_share=0.25)
    for k in range(K):
        w = resp[:, k]
        mean = np.average(X, axis=0, weights=w)                     # numpy reference
        cov = np.cov(X, rowvar=False, aweights=w, bias=True)
        assert np.allclose(got.means[k], mean, rtol=1e-10)
        assert np.allclose(got.covs[k], cov, rtol=1e-8, atol=1e-10)
        assert got.n_eff[k] == pytest.approx(w.sum() ** 2 / (w * w).sum(), rel=1e-12)  # Kish
        d = mahalanobis(mean, ref.means[k], np.linalg.inv(ref.covariances[k]))   # scipy
        assert got.mean_shift[k] == pytest.approx(d, rel=1e-9)
        assert got.weight_change[k] == pytest.approx(abs(w.sum() / N - 1.0 / K), rel=1e-12)
        log_ratio = np.linalg.slogdet(cov)[1] - np.linalg.slogdet(ref.covariances[k])[1]
        assert got.spread[k] == pytest.approx(abs(log_ratio) / (2 * D), rel=1e-8)
    assert np.all(got.missing_share == 0.0)


def test_windows_stacked_give_each_window_its_own_statistics():
    # several windows at once (different centres, row counts, one with a weighted mass
    # B and one where a segment is all but gone) against one call per window
    ref = _baseline()
    factors = GaussianSet(ref.means, ref.covariances)
    windows, centers, n_rows = [], [], []
    for seed in range(3):
        X, resp, center, sums = _window(seed)
        if seed == 1:
            sums.B = sums.T * 0.97
        if seed == 2:
            sums.T[0] *= 1e-3
        windows.append(sums)
        centers.append(center + seed)
        n_rows.append(N + 10 * seed)
    together = window_statistics(ref, factors, n_rows, stack_sums(windows), np.array(centers),
                                 min_share=0.25, feature_shift=True)
    for w, sums in enumerate(windows):
        one = _one_window(ref, factors, n_rows[w], sums, centers[w], min_share=0.25,
                                 feature_shift=True)
        part = together.rows(w * K, (w + 1) * K)
        for name in ("share", "low", "seen", "n_eff", "means", "covs", "mean_shift",
                     "spread", "spread_noise", "weight_noise", "missing_share",
                     "feature_shift", "feature_noise"):
            assert np.allclose(getattr(part, name), getattr(one, name), rtol=1e-12,
                               equal_nan=True), name
    assert together.low[2 * K] and not together.low[:2 * K].any()
    # weighted sums are means over their mass B, not over the counts T
    part = together.rows(K, 2 * K)
    assert np.allclose(part.means, centers[1] + windows[1].M / windows[1].B[:, None],
                       rtol=1e-12)


def test_spread_noise_from_a_kept_baseline_variance_is_the_same():
    X, resp, center, sums = _window()
    ref = _baseline()
    factors = GaussianSet(ref.means, ref.covariances)
    plain = _one_window(ref, factors, N, sums, center, min_share=0.25)
    kept = _one_window(ref, factors, N, sums, center, min_share=0.25,
                              ref_spread_variance=spread_variance(ref.n_eff, D, "full"))
    assert np.array_equal(plain.spread_noise, kept.spread_noise)
    assert np.allclose(plain.spread_noise * 2 * D,
                       spread_noise(plain.n_eff, D, "full", ref.n_eff), rtol=1e-12)


def test_a_segment_that_lost_its_rows_is_not_measured_for_its_shape():
    X, resp, center, sums = _window()
    ref = _baseline()
    sums.T[2], sums.Q[2] = 0.01 * sums.T[2], 0.01 * sums.Q[2]     # share far under 1/4 of 1/3
    got = _one_window(ref, GaussianSet(ref.means, ref.covariances), N, sums, center,
                             min_share=0.25)
    assert got.low.tolist() == [False, False, True]
    assert np.isnan(got.mean_shift[2]) and np.isnan(got.spread[2])


def test_fit_statistics_are_the_mean_and_scipy_standard_error():
    ld = np.random.default_rng(4).normal(-6.0, 1.5, 2000)
    value, noise, mean = fit_statistics(-5.5, len(ld), float(ld.sum()), float(ld @ ld))
    assert mean == pytest.approx(ld.mean(), rel=1e-12)
    assert value == pytest.approx(-5.5 - ld.mean(), rel=1e-12)
    assert noise == pytest.approx(stats.sem(ld), rel=1e-9)                 # scipy reference
    assert fit_statistics(float("nan"), len(ld), 0.0, 0.0) is None
    assert fit_statistics(-5.5, 1, -6.0, 36.0) is None


def test_baseline_from_sums_takes_the_rows_weighted_moments():
    from shoal.core import initialise

    X, resp, center, sums = _window()
    mixture = initialise(X, K, "full", seed=0, n_init=1)
    got = baseline_from_sums(mixture, sums, N, -7.0 * N, center)
    for k in range(K):
        w = resp[:, k]
        assert got.weights[k] == pytest.approx(w.sum() / N, rel=1e-12)
        assert np.allclose(got.means[k], np.average(X, axis=0, weights=w), rtol=1e-10)
        assert np.allclose(got.covariances[k],
                           np.cov(X, rowvar=False, aweights=w, bias=True), rtol=1e-8)
    assert got.log_density == pytest.approx(-7.0)
    assert got.total_n_eff == N


def test_recent_share_of_a_group_is_its_steady_rate_despite_an_old_stray_row():
    from shoal.core.segment_groups import recent_share

    steady = np.arange(1000, 2000, 10)            # one row in ten since row 1000
    assert recent_share(steady, 2000) == pytest.approx(0.1)
    assert recent_share(np.concatenate([[0], steady]), 2000) == pytest.approx(0.1)
    assert recent_share(steady[::-1], 2000) == pytest.approx(0.1)   # order does not matter


@pytest.mark.parametrize("covariance", ["full", "diag", "spherical"])
def test_the_compiled_pass_gives_the_statistics_of_the_numpy_path(covariance):
    # means, covariances, mean shifts and spreads of stacked windows from the compiled
    # kernels (shoal.core._kernels.window_shapes) against the numpy path, with a segment
    # too small to be measured and a window covariance that is not positive definite
    from shoal.core import fused
    if not fused.enabled():
        pytest.skip("the compiled kernels are not built or SHOAL_COMPILED=0")
    ref = replace(_baseline(), covariance=covariance)
    factors = GaussianSet(ref.means, ref.covariances)
    windows, centers = [], []
    for seed in range(3):
        X, resp, center, sums = _window(seed)
        if seed == 1:
            sums.T[0] *= 1e-3      # too small a share: not measured
        if seed == 2:
            sums.S[1] = 0.0        # no scatter: not positive definite, no variance
            sums.S[2] = np.outer(sums.M[2], sums.M[2]) / sums.T[2]   # singular, variances 0
        windows.append(sums)
        centers.append(center + seed)
    kw = dict(min_share=0.25, feature_shift=True)
    stacked = stack_sums(windows)
    compiled = window_statistics(ref, factors, [N] * 3, stacked, np.array(centers), **kw)
    fused.set_enabled(False)
    try:
        plain = window_statistics(ref, factors, [N] * 3, stacked, np.array(centers), **kw)
    finally:
        fused.set_enabled(True)
    assert compiled.low[K] and not plain.seen[K]
    assert np.isnan(plain.spread[2 * K + 1]) and np.isnan(plain.spread[2 * K + 2])
    assert np.isfinite(plain.spread[[0, 1, 2, K + 1, K + 2, 2 * K]]).all()
    for name in ("seen", "n_eff", "means", "covs", "mean_shift", "t2", "spread",
                 "spread_noise", "feature_shift", "feature_noise"):
        assert np.allclose(getattr(compiled, name), getattr(plain, name), rtol=1e-10,
                           atol=1e-12, equal_nan=True), name
