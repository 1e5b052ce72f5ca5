"""Rows of a seeded random full-covariance Gaussian mixture (synthetic data for the
benchmark and study scripts).

Weights from a symmetric Dirichlet(5), means normal with sd ``spread``, covariances
``A A' + 0.5 I`` with ``A`` normal of sd ``shape``; all drawn from one generator in
that order, then the rows' components and the rows themselves, so one seed gives one
data set whatever script draws it.
"""
from __future__ import annotations

import numpy as np

__all__ = ["mixture_rows"]


def mixture_rows(n_rows, n_components, n_features, seed, spread=4.0, shape=0.3):
    """``n_rows`` rows of a seeded random mixture, and the mixture they come from.

    Returns ``(X, labels, weights, means, covs)``: rows (n_rows, n_features), their
    components (n_rows,), and the mixture's weights (K,), means (K, D) and covariances
    (K, D, D).
    """
    rng = np.random.default_rng(seed)
    weights = rng.dirichlet(np.full(n_components, 5.0))
    means = rng.normal(0.0, spread, (n_components, n_features))
    A = rng.normal(0.0, shape, (n_components, n_features, n_features))
    covs = A @ np.swapaxes(A, 1, 2) + 0.5 * np.eye(n_features)
    labels = rng.choice(n_components, size=n_rows, p=weights)
    chol = np.linalg.cholesky(covs)
    noise = rng.normal(size=(n_rows, n_features))
    X = means[labels] + np.einsum("nde,ne->nd", chol[labels], noise)
    return X, labels, weights, means, covs
