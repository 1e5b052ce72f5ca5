"""Behaviour of batch EM and initialisation: monotone, translation-safe, degenerate-safe."""

import warnings

import numpy as np
import pytest

from shoal.core import (
    IllConditionedError, Mixture, NotEnoughDataError, batch_em, initialise, select_n_components,
)

# every check here runs on the compiled kernels and on the numpy path
pytestmark = pytest.mark.usefixtures("scoring_path")


@pytest.mark.parametrize("covariance", ["full", "diag", "spherical"])
def test_batch_em_never_lowers_the_likelihood(covariance, mixture_data):
    X, *_ = mixture_data(4000, 4, 3, seed=21, spread=1.5)
    rng = np.random.default_rng(0)
    start = Mixture.from_parameters(
        np.full(4, 0.25), X[rng.choice(len(X), 4, replace=False)],
        {"full": np.broadcast_to(np.eye(3), (4, 3, 3)).copy(), "diag": np.ones((4, 3)),
         "spherical": np.ones(4)}[covariance],
        covariance=covariance,
    )
    _, history = batch_em(X, start, max_iter=60, tol=-np.inf)
    assert len(history) == 61
    steps = np.diff(history)
    assert steps.min() >= -1e-10, f"likelihood fell by {-steps.min()}"
    assert history[-1] > history[0] + 0.1


def test_initialise_is_deterministic_from_its_seed(mixture_data):
    X, *_ = mixture_data(2000, 3, 3, seed=5)
    a = initialise(X, 3, seed=7, n_init=3)
    b = initialise(X, 3, seed=7, n_init=3)
    for name in ("s0", "s1", "s2", "means", "covariances"):
        assert np.array_equal(getattr(a, name), getattr(b, name))


@pytest.mark.parametrize("covariance", ["full", "diag"])
def test_far_from_zero_data_gives_the_same_fit(covariance, mixture_data):
    X, *_ = mixture_data(3000, 3, 4, seed=8)
    centred = initialise(X, 3, covariance, seed=3, n_init=3)
    shifted = initialise(X + 1e6, 3, covariance, seed=3, n_init=3)
    np.testing.assert_allclose(shifted.data_means(), centred.data_means() + 1e6, rtol=1e-12)
    np.testing.assert_allclose(shifted.data_means() - 1e6, centred.data_means(), rtol=1e-6, atol=1e-6)
    np.testing.assert_allclose(shifted.data_covariances(), centred.data_covariances(), rtol=1e-6)
    np.testing.assert_allclose(shifted.weights, centred.weights, rtol=1e-6)
    # stepwise learning after warm-up keeps the equivalence too
    more, *_ = mixture_data(5000, 3, 4, seed=9)
    a, _ = centred.learn(more)
    b, _ = shifted.learn(more + 1e6)
    np.testing.assert_allclose(b.data_covariances(), a.data_covariances(), rtol=1e-6)


def test_duplicated_rows_keep_valid_covariances(mixture_data):
    X, *_ = mixture_data(300, 3, 3, seed=12)
    X = np.repeat(X[:40], 10, axis=0)  # every point ten times
    m = initialise(X, 3, "full", seed=0)
    assert np.all(np.linalg.eigvalsh(m.data_covariance_matrices()) > 0)


def test_constant_feature_warns_and_keeps_valid_covariances(mixture_data):
    X, *_ = mixture_data(1000, 2, 3, seed=13)
    X[:, 1] = 42.0
    with pytest.warns(RuntimeWarning, match=r"features \[1\] are constant"):
        m = initialise(X, 2, "full", seed=0)
    assert np.all(np.linalg.eigvalsh(m.data_covariance_matrices()) > 0)
    assert np.all(np.isfinite(m.log_density(X)))
    m2, _ = m.learn(X[:500])
    assert np.all(np.isfinite(m2.log_density(X)))


def test_too_few_distinct_points_gives_our_error_and_remedy():
    X = np.repeat(np.array([[1.0, 2.0], [3.0, 5.0]]), 50, axis=0)
    with pytest.raises(NotEnoughDataError, match="ask for at most 2 segments"):
        initialise(X, 3, "full")
    # the documented remedy works
    m = initialise(X, 2, "full")
    assert np.all(np.isfinite(m.log_density(X)))


def test_fewer_rows_than_components():
    with pytest.raises(NotEnoughDataError, match="cannot seed 5 segments"):
        initialise(np.arange(6.0).reshape(3, 2), 5)


def test_ill_conditioning_raises_our_error_with_advice():
    bad = np.full((1, 2, 2), 1.0)  # singular, and reg_covar=0 cannot save it
    with pytest.raises(IllConditionedError, match="reg_covar"):
        Mixture.from_parameters([1.0], np.zeros((1, 2)), bad, reg_covar=0.0)
    # the remedy: a positive reg_covar applied when parameters are derived
    ok = Mixture.from_parameters([1.0], np.zeros((1, 2)), bad + 1e-4 * np.eye(2))
    assert np.isfinite(ok.log_density(np.zeros((1, 2)))).all()


def test_select_n_components_by_bic(mixture_data):
    X, *_ = mixture_data(3000, 3, 2, seed=14, spread=6.0)
    m, table = select_n_components(X, 1, 5, "full", seed=0, n_init=2)
    assert [row["n_components"] for row in table] == [1, 2, 3, 4, 5]
    assert m.n_components == 3
    bics = [row["bic"] for row in table]
    assert int(np.argmin(bics)) == 2
