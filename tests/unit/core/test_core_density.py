"""Scoring kernels against independent references (scipy, numpy.linalg)."""

import numpy as np
import pytest
from scipy.stats import multivariate_normal

from shoal.core import Mixture
from shoal.core.covariance import FAMILIES

# every check here runs on the compiled kernels and on the numpy path
pytestmark = pytest.mark.usefixtures("scoring_path")


def _random_mixture(covariance, seed, n_components=3, n_features=4):
    rng = np.random.default_rng(seed)
    means = rng.normal(0, 3, (n_components, n_features)) + 100.0
    if covariance == "full":
        A = rng.normal(size=(n_components, n_features, n_features))
        cov = A @ np.swapaxes(A, 1, 2) + 0.2 * np.eye(n_features)
    elif covariance == "diag":
        cov = rng.uniform(0.2, 3.0, (n_components, n_features))
    else:
        cov = rng.uniform(0.2, 3.0, n_components)
    weights = rng.dirichlet(np.ones(n_components))
    # a non-trivial pivot and scale so the standardised-units path is exercised
    center = np.full(n_features, 99.0)
    scale = np.full(n_features, 1.7) if covariance == "spherical" else rng.uniform(0.5, 2.0, n_features)
    m = Mixture.from_parameters(weights, means, cov, covariance=covariance, center=center, scale=scale)
    return m, rng


@pytest.mark.parametrize("covariance", ["full", "diag", "spherical"])
def test_component_log_density_matches_scipy(covariance):
    m, rng = _random_mixture(covariance, seed=1)
    X = m.data_means()[0] + rng.normal(0, 2, (200, m.n_features))
    ours = m.component_log_density(X)
    mats = m.data_covariance_matrices()
    for k in range(m.n_components):
        # Reference: scipy.stats.multivariate_normal.logpdf
        ref = multivariate_normal(mean=m.data_means()[k], cov=mats[k]).logpdf(X)
        np.testing.assert_allclose(ours[:, k], ref, rtol=1e-10)


@pytest.mark.parametrize("covariance", ["full", "diag", "spherical"])
def test_mixture_log_density_and_responsibilities(covariance):
    m, rng = _random_mixture(covariance, seed=2)
    X = rng.normal(100, 3, (300, m.n_features))
    mats = m.data_covariance_matrices()
    comp = np.column_stack(
        [np.log(m.weights[k]) + multivariate_normal(m.data_means()[k], mats[k]).logpdf(X)
         for k in range(m.n_components)]
    )
    ref_total = np.logaddexp.reduce(comp, axis=1)
    s = m.score(X)
    np.testing.assert_allclose(s.log_density, ref_total, rtol=1e-10)
    np.testing.assert_allclose(s.resp, np.exp(comp - ref_total[:, None]), rtol=1e-8, atol=1e-14)
    np.testing.assert_allclose(s.resp.sum(axis=1), 1.0, rtol=1e-12)
    assert np.array_equal(s.component, np.argmax(comp, axis=1))
    np.testing.assert_allclose(s.confidence, s.resp.max(axis=1))


def test_precision_cholesky_against_inverse_and_slogdet():
    rng = np.random.default_rng(3)
    A = rng.normal(size=(4, 6, 6))
    cov = A @ np.swapaxes(A, 1, 2) + 0.1 * np.eye(6)
    fam = FAMILIES["full"]
    U = fam.precision_cholesky(cov)
    for k in range(4):
        np.testing.assert_allclose(U[k] @ U[k].T, np.linalg.inv(cov[k]), rtol=1e-9, atol=1e-12)
        sign, logdet = np.linalg.slogdet(cov[k])
        assert sign > 0
        np.testing.assert_allclose(fam.log_det(U, 6)[k], -0.5 * logdet, rtol=1e-12)


def test_scoring_survives_where_det_overflows():
    # np.linalg.det of a 400-d covariance with variances 1e3 overflows to inf;
    # the precision-Cholesky path (like scipy's slogdet) stays finite.
    d = 400
    m = Mixture.from_parameters([1.0], np.zeros((1, d)), np.full((1, d), 1e3), covariance="diag")
    with np.errstate(over="ignore"):
        assert np.isinf(np.linalg.det(np.diag(np.full(d, 1e3))))
    ld = m.log_density(np.zeros((2, d)))
    ref = multivariate_normal(np.zeros(d), np.diag(np.full(d, 1e3))).logpdf(np.zeros(d))
    np.testing.assert_allclose(ld, ref, rtol=1e-10)


def test_bad_shapes_are_reported_plainly():
    m, _ = _random_mixture("full", seed=4)
    with pytest.raises(ValueError, match=r"shape \(n_samples, 4\), got \(5, 3\)"):
        m.score(np.zeros((5, 3)))
    with pytest.raises(ValueError, match="infinite"):
        m.score(np.full((2, 4), np.inf))
    with pytest.raises(ValueError, match=r"means should have shape"):
        Mixture.from_parameters([1.0], np.zeros(3), np.ones((1, 3)), covariance="diag")
