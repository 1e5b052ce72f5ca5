"""Rows with missing features: marginal scoring and EM with missing data, against
independent references (scipy.stats.multivariate_normal on the observed sub-vector; the
Ghahramani & Jordan 1994 E and M steps written out here with numpy)."""

import numpy as np
import pytest
from scipy.special import logsumexp
from scipy.stats import multivariate_normal

from shoal.core import Mixture, ModelError, StepSchedule

# every check here runs on the compiled kernels and on the numpy path
pytestmark = pytest.mark.usefixtures("scoring_path")

TYPES = ["full", "diag", "spherical"]


def _mixture(covariance, seed, n_components=3, n_features=5, prior_weight=1e-3):
    rng = np.random.default_rng(seed)
    means = rng.normal(0, 3, (n_components, n_features)) + 50.0
    if covariance == "full":
        A = rng.normal(size=(n_components, n_features, n_features))
        cov = A @ np.swapaxes(A, 1, 2) + 0.3 * np.eye(n_features)
    elif covariance == "diag":
        cov = rng.uniform(0.2, 3.0, (n_components, n_features))
    else:
        cov = rng.uniform(0.2, 3.0, n_components)
    weights = rng.dirichlet(np.full(n_components, 3.0))
    center = np.full(n_features, 49.0)
    scale = (np.full(n_features, 1.3) if covariance == "spherical"
             else rng.uniform(0.5, 2.0, n_features))
    m = Mixture.from_parameters(weights, means, cov, covariance=covariance, center=center,
                                scale=scale, prior_weight=prior_weight)
    return m, rng


def _with_gaps(X, rng, share):
    """Random missing values (every count of missing features up to all but one occurs)."""
    X = X.copy()
    n, d = X.shape
    hole = rng.random((n, d)) < share
    hole[np.arange(n), rng.integers(0, d, n)] = False      # at least one observed
    hole[: n // 10] = False                                # some complete rows among them
    X[hole] = np.nan
    return X


def _reference_marginals(m, X):
    """log w_k + log N(x_o | mu_o, Sigma_oo) per row and component, by scipy on the
    observed sub-vector (reference: scipy.stats.multivariate_normal.logpdf)."""
    means, mats = m.data_means(), m.data_covariance_matrices()
    out = np.empty((X.shape[0], m.n_components))
    for i, x in enumerate(X):
        o = ~np.isnan(x)
        for k in range(m.n_components):
            out[i, k] = np.log(m.weights[k]) + multivariate_normal(
                means[k][o], mats[k][np.ix_(o, o)]).logpdf(x[o])
    return out


@pytest.mark.parametrize("covariance", TYPES)
def test_marginal_log_density_matches_scipy_on_observed_subvector(covariance):
    m, rng = _mixture(covariance, seed=11)
    X = _with_gaps(m.data_means()[rng.integers(0, 3, 400)] + rng.normal(0, 1.5, (400, 5)),
                   rng, share=0.35)
    assert np.isnan(X).any(axis=1).mean() > 0.5
    comp = _reference_marginals(m, X)
    total = logsumexp(comp, axis=1)
    s = m.score(X)
    np.testing.assert_allclose(s.log_density, total, rtol=1e-10)
    np.testing.assert_allclose(s.resp, np.exp(comp - total[:, None]), rtol=1e-8, atol=1e-14)
    assert np.array_equal(s.component, np.argmax(comp, axis=1))
    np.testing.assert_allclose(s.confidence, s.resp.max(axis=1))
    # learning scores each row exactly as scoring does (no refresh inside 400 rows)
    _, learned = m.learn(X)
    np.testing.assert_allclose(learned.log_density, total, rtol=1e-10)


@pytest.mark.parametrize("covariance", TYPES)
def test_complete_rows_score_as_before_beside_rows_with_gaps(covariance):
    m, rng = _mixture(covariance, seed=12)
    X = m.data_means()[rng.integers(0, 3, 300)] + rng.normal(0, 1.5, (300, 5))
    gappy = _with_gaps(X, rng, share=0.3)
    complete = ~np.isnan(gappy).any(axis=1)
    np.testing.assert_allclose(m.score(gappy).log_density[complete],
                               m.score(X[complete]).log_density, rtol=1e-12)


def test_a_row_with_nothing_observed_gets_the_weights():
    m, _ = _mixture("full", seed=13)
    s = m.score(np.full((2, 5), np.nan))
    np.testing.assert_allclose(s.log_density, 0.0, atol=1e-12)
    np.testing.assert_allclose(s.resp, np.tile(m.weights, (2, 1)), rtol=1e-12)


def test_infinite_values_are_still_refused():
    m, _ = _mixture("diag", seed=14)
    X = np.full((3, 5), 50.0)
    X[0, 1], X[2, 3] = np.nan, np.inf
    with pytest.raises(ModelError, match="infinite"):
        m.score(X)
    with pytest.raises(ModelError, match="infinite"):
        m.learn(X)


# ------------------------------------------------------------------ learning
def _gj_em_step(m, X, reg_covar):
    """One batch EM step with missing data, written out from Ghahramani & Jordan (1994),
    "Supervised learning from incomplete data via an EM approach", section 3 (and Little
    & Rubin, Statistical Analysis with Missing Data, 2nd ed., section 11.2), in data
    units, with full covariance matrices. E-step per row and component: responsibility
    from the observed marginal; x_hat with x_m = mu_m + S_mo S_oo^-1 (x_o - mu_o); the
    second moment x_hat x_hat^T + (S_mm - S_mo S_oo^-1 S_om) on the missing block.
    M-step: weights, means and covariances from those expectations."""
    means, covs, w = m.data_means(), m.data_covariance_matrices(), m.weights
    n, d = X.shape
    K = len(w)
    logr = np.empty((n, K))
    xhat = np.empty((n, K, d))
    second = np.empty((n, K, d, d))
    for i, x in enumerate(X):
        o = ~np.isnan(x)
        mi = ~o
        for k in range(K):
            S = covs[k]
            Soo, Smo, Smm = S[np.ix_(o, o)], S[np.ix_(mi, o)], S[np.ix_(mi, mi)]
            logr[i, k] = np.log(w[k]) + multivariate_normal(means[k][o], Soo).logpdf(x[o])
            B = Smo @ np.linalg.inv(Soo)
            v = x.copy()
            v[mi] = means[k][mi] + B @ (x[o] - means[k][o])
            C = np.zeros((d, d))
            C[np.ix_(mi, mi)] = Smm - B @ Smo.T
            xhat[i, k] = v
            second[i, k] = np.outer(v, v) + C
    r = np.exp(logr - logsumexp(logr, axis=1, keepdims=True))
    nk = r.sum(axis=0)
    new_w = nk / n
    new_means = np.einsum("nk,nkd->kd", r, xhat) / nk[:, None]
    new_covs = (np.einsum("nk,nkde->kde", r, second) / nk[:, None, None]
                - new_means[:, :, None] * new_means[:, None, :]) + reg_covar * np.eye(d)
    return new_w, new_means, new_covs, float(np.mean(logsumexp(logr, axis=1)))


@pytest.mark.parametrize("covariance", TYPES)
def test_batch_em_step_matches_ghahramani_jordan(covariance):
    m, rng = _mixture(covariance, seed=21, prior_weight=0.0)
    X = _with_gaps(m.data_means()[rng.integers(0, 3, 500)] + rng.normal(0, 1.2, (500, 5)),
                   rng, share=0.3)
    new, mean_ld = m.em_step(X)
    w, mu, cov, ref_ld = _gj_em_step(m, X, 0.0)
    # the mixture adds reg_covar (in standardised units) to the diagonal: the reference
    # gets the same in data units
    cov = cov + m.reg_covar * np.diag(m.scale**2)
    np.testing.assert_allclose(mean_ld, ref_ld, rtol=1e-10)
    np.testing.assert_allclose(new.weights, w, rtol=1e-8)
    np.testing.assert_allclose(new.data_means(), mu, rtol=1e-8)
    ours = new.data_covariance_matrices()
    if covariance == "diag":
        cov = np.einsum("kdd->kd", cov)[:, :, None] * np.eye(5)
    elif covariance == "spherical":
        # the spherical M-step is the mean of the per-feature variances in standardised
        # units (a common scale here)
        cov = (np.trace(cov, axis1=1, axis2=2) / 5)[:, None, None] * np.eye(5)
    np.testing.assert_allclose(ours, cov, rtol=1e-8, atol=1e-12)


@pytest.mark.parametrize("covariance", TYPES)
def test_stepwise_learning_of_gaps_equals_batch_statistics_at_step_one(covariance):
    # alpha=1, i0=0 makes the first row's step 1 and the batch the running average,
    # so one learn() over rows with gaps gives the batch EM statistics (no refresh)
    m, rng = _mixture(covariance, seed=22, prior_weight=0.0)
    X = _with_gaps(m.data_means()[rng.integers(0, 3, 300)] + rng.normal(0, 1.2, (300, 5)),
                   rng, share=0.3)
    stepper = Mixture.from_parameters(m.weights, m.data_means(), m.data_covariances()
                                      if covariance != "spherical" else m.covariances * 1.69,
                                      covariance=covariance, center=m.center, scale=m.scale,
                                      prior_weight=0.0, refresh_rows=1 << 20,
                                      schedule=StepSchedule(alpha=1.0, i0=0.0))
    learned, _ = stepper.learn(X)
    batch, _ = m.em_step(X)
    np.testing.assert_allclose(learned.s0, batch.s0, rtol=1e-9)
    np.testing.assert_allclose(learned.s1, batch.s1, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(learned.s2, batch.s2, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("covariance", TYPES)
def test_expected_scatter_is_the_ghahramani_jordan_second_moment(covariance):
    # the drift windows' E-step sums against the written-out G&J expectations above
    from shoal.core.missing import expected_scatter, find
    m, rng = _mixture(covariance, seed=41, prior_weight=0.0)
    X = _with_gaps(m.data_means()[rng.integers(0, 3, 60)] + rng.normal(0, 1.2, (60, 5)),
                   rng, share=0.3)
    gaps = find(X)
    Zf = np.where(gaps.mask, 0.0, (X[gaps.rows] - m.center) / m.scale)
    resp = m.score(X).resp[gaps.rows].T
    s1, scatter = expected_scatter(m, Zf, gaps.mask, resp)
    means, covs = m.data_means(), m.data_covariance_matrices()
    for k in range(m.n_components):
        ref1, ref2 = np.zeros(5), np.zeros((5, 5))
        for j, x in enumerate(X[gaps.rows]):
            o, mi = ~np.isnan(x), np.isnan(x)
            S = covs[k]
            B = S[np.ix_(mi, o)] @ np.linalg.inv(S[np.ix_(o, o)])
            v = x.copy()
            v[mi] = means[k][mi] + B @ (x[o] - means[k][o])
            C = np.zeros((5, 5))
            C[np.ix_(mi, mi)] = S[np.ix_(mi, mi)] - B @ S[np.ix_(o, mi)]
            z = (v - m.center) / m.scale
            ref1 += resp[k, j] * z
            ref2 += resp[k, j] * (np.outer(z, z) + C / np.outer(m.scale, m.scale))
        np.testing.assert_allclose(s1[k], ref1, rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(scatter[k], ref2, rtol=1e-9, atol=1e-12)


def test_rows_with_half_their_features_get_the_true_component():
    # well-separated synthetic mixture (means 8 sds apart on average, K=4, D=6): a model
    # warmed up on complete rows and streamed over rows with 30% of values missing
    # labels rows with 3, 4 or 5 of 6 features by their true component in >= 95% of rows
    from scipy.optimize import linear_sum_assignment

    from shoal.core import initialise
    rng = np.random.default_rng(51)
    K, D = 4, 6
    means = rng.normal(0.0, 6.0, (K, D))
    A = rng.normal(0.0, 0.3, (K, D, D))
    chol = np.linalg.cholesky(A @ np.swapaxes(A, 1, 2) + 0.5 * np.eye(D))

    def draw(n):
        z = rng.integers(0, K, n)
        return means[z] + np.einsum("nde,ne->nd", chol[z], rng.normal(size=(n, D))), z

    X, _ = draw(40_000)
    model = initialise(X[:5_000], K, "full", seed=0, n_init=3)
    model, _ = model.learn(_with_gaps(X[5_000:], rng, share=0.3))
    Y, truth = draw(20_000)
    keep = rng.integers(3, D + 1, len(Y))            # features kept per row: 3..6
    rank = np.argsort(np.argsort(rng.random(Y.shape), axis=1), axis=1)
    Y[rank >= keep[:, None]] = np.nan                # a random set of keep[i] stays
    got = model.score(Y).component
    match = linear_sum_assignment(-np.histogram2d(got, truth, bins=(K, K),
                                                  range=((0, K), (0, K)))[0])
    relabel = dict(zip(match[0].tolist(), match[1].tolist()))
    agree = np.array([relabel[c] for c in got]) == truth
    for c in range(3, D):
        print(f"{c} of {D} features observed: {agree[keep == c].mean():.4f} agree")
        assert agree[keep == c].mean() >= 0.95
