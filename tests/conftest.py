"""Shared fixtures: seeded synthetic mixtures and a guard against leaked threads."""

import threading

import numpy as np
import pytest

from shoal.daemon.runtime.compiled_switch import apply_environment

# SHOAL_COMPILED=0 in the environment runs the suite on core's numpy path, as it does the
# `shoal` command (core reads no environment; the daemon's start-up switch does).
apply_environment()


def make_mixture_data(n_rows, n_components, n_features, *, seed, spread=4.0, cond=0.3):
    """Rows from a seeded random full-covariance Gaussian mixture (synthetic test data).

    Returns X (n_rows, n_features), labels (n_rows,), and the true weights, means, covariances.
    """
    rng = np.random.default_rng(seed)
    weights = rng.dirichlet(np.full(n_components, 5.0))
    means = rng.normal(0.0, spread, (n_components, n_features))
    A = rng.normal(0.0, cond, (n_components, n_features, n_features))
    covs = A @ np.swapaxes(A, 1, 2) + np.eye(n_features) * 0.5
    labels = rng.choice(n_components, size=n_rows, p=weights)
    chol = np.linalg.cholesky(covs)
    noise = rng.normal(size=(n_rows, n_features))
    X = means[labels] + np.einsum("nde,ne->nd", chol[labels], noise)
    return X, labels, weights, means, covs


@pytest.fixture
def mixture_data():
    return make_mixture_data


@pytest.fixture(autouse=True)
def no_leaked_threads():
    """Fail a test that leaves threads running (watchdog's tests do the same)."""
    before = set(threading.enumerate())
    yield
    deadline_threads = [t for t in threading.enumerate() if t not in before and t.is_alive()]
    for t in deadline_threads:
        t.join(timeout=5.0)
    leaked = [t for t in deadline_threads if t.is_alive()]
    assert not leaked, f"test leaked threads: {leaked}"


@pytest.fixture(params=["compiled", "numpy"])
def scoring_path(request):
    """Run a test on the compiled kernels (core/_kernels.c) and on the numpy path."""
    from shoal.core import fused

    before = fused.enabled()
    if request.param == "compiled" and not before:
        pytest.skip("the compiled kernels are not built or SHOAL_COMPILED=0")
    fused.set_enabled(request.param == "compiled")
    yield request.param
    fused.set_enabled(before)
