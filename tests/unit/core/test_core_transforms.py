"""Per-feature transforms: Yeo-Johnson's maximum-likelihood parameter, the transforms and
their inverses, domains as masks, and the log-density in the data's units."""
import numpy as np
import pytest
from scipy import optimize, stats

from shoal.core import FeatureTransforms, Mixture, data_log_density
from shoal.core.yeo_johnson import (
    fit_yeo_johnson,
    yeo_johnson,
    yeo_johnson_inverse,
    yeo_johnson_log_jacobian,
)


def _profile_llf(lmbda, x):
    """The Yeo-Johnson profile log-likelihood written out from Yeo & Johnson (2000),
    Biometrika 87(4), section 3 (mean and variance of the normal profiled out)."""
    pos, neg = x[x >= 0], x[x < 0]
    y = np.concatenate([
        ((pos + 1) ** lmbda - 1) / lmbda if lmbda != 0 else np.log(pos + 1),
        -((1 - neg) ** (2 - lmbda) - 1) / (2 - lmbda) if lmbda != 2 else -np.log(1 - neg)])
    n = len(x)
    sigma2 = np.sum((y - y.mean()) ** 2) / n
    return -n / 2 * np.log(sigma2) + (lmbda - 1) * np.sum(np.sign(x) * np.log(np.abs(x) + 1))


@pytest.mark.parametrize("seed, sample", [
    (0, lambda rng: rng.lognormal(0.5, 0.8, 2000)),              # right-skewed, positive
    (1, lambda rng: 3.0 - rng.lognormal(0.0, 0.7, 2000)),         # left-skewed, both signs
    (2, lambda rng: rng.normal(0.0, 2.0, 2000)),                  # symmetric: lambda ~ 1
    (3, lambda rng: -rng.gamma(2.0, 1.5, 1500)),                  # all negative
])
def test_yeo_johnson_lambda_is_the_maximum_likelihood_one(seed, sample):
    x = sample(np.random.default_rng(seed))
    fitted = fit_yeo_johnson(x)
    # reference 1: the profile log-likelihood above, maximised by scipy.optimize
    res = optimize.minimize_scalar(lambda l: -_profile_llf(l, x), bracket=(0.0, 1.0),
                                   method="brent", tol=1e-12)
    assert fitted == pytest.approx(res.x, rel=1e-6, abs=1e-7)
    # reference 2: scipy.stats.yeojohnson (its own maximum-likelihood lambda)
    y_ref, lmbda_ref = stats.yeojohnson(x)
    assert fitted == pytest.approx(lmbda_ref, rel=1e-6)
    np.testing.assert_allclose(yeo_johnson(x, fitted), stats.yeojohnson(x, fitted),
                               rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(yeo_johnson(x, lmbda_ref), y_ref, rtol=1e-12, atol=1e-12)


def test_fitted_lambda_is_used_by_feature_transforms():
    rng = np.random.default_rng(4)
    X = np.column_stack([rng.lognormal(0, 0.9, 3000), rng.normal(0, 1, 3000)])
    t = FeatureTransforms.from_kinds(["yeo-johnson", "none"]).fit(X)
    y_ref, lmbda_ref = stats.yeojohnson(X[:, 0])   # scipy as the reference
    assert t.lambdas[0] == pytest.approx(lmbda_ref, rel=1e-6)
    assert np.isnan(t.lambdas[1])
    Y, inside = t.forward(X)
    assert inside.all()
    np.testing.assert_allclose(Y[:, 0], stats.yeojohnson(X[:, 0], t.lambdas[0]), rtol=1e-12)
    np.testing.assert_array_equal(Y[:, 1], X[:, 1])
    # the parameter round-trips through the JSON-able form
    back = FeatureTransforms.from_dict(t.to_dict())
    np.testing.assert_array_equal(back.forward(X)[0], Y)


@pytest.mark.parametrize("lmbda", [-1.3, 0.0, 0.4, 1.0, 2.0, 2.7])
def test_yeo_johnson_inverse_and_jacobian(lmbda):
    x = np.linspace(-3, 5, 41)
    y = yeo_johnson(x, lmbda)
    np.testing.assert_allclose(y, stats.yeojohnson(x, lmbda), rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(yeo_johnson_inverse(y, lmbda), x, rtol=1e-10, atol=1e-12)
    # the log-Jacobian against a central finite difference of scipy's transform
    h = 1e-6
    slope = (stats.yeojohnson(x + h, lmbda) - stats.yeojohnson(x - h, lmbda)) / (2 * h)
    np.testing.assert_allclose(yeo_johnson_log_jacobian(x, lmbda), np.log(slope),
                               rtol=1e-6, atol=1e-7)


@pytest.mark.parametrize("kind, x, expect_inside", [
    ("log", [0.5, 0.0, -1.0, 2.0, np.nan, np.inf], [1, 0, 0, 1, 0, 0]),
    ("log1p", [0.0, -0.5, -1.0, -2.0, 3.0], [1, 1, 0, 0, 1]),
    ("logit", [0.0, 0.2, 1.0, 0.999, 1.5], [0, 1, 0, 1, 0]),
    ("yeo-johnson", [-5.0, 0.0, 5.0, np.nan], [1, 1, 1, 0]),
    ("none", [-1e9, 0.0, np.inf], [1, 1, 0]),
])
def test_domain_is_a_mask_not_an_error(kind, x, expect_inside):
    t = FeatureTransforms.from_kinds([kind])
    if kind == "yeo-johnson":
        t = FeatureTransforms(t.kinds, np.array([0.5]))
    X = np.array(x)[:, None]
    Y, inside = t.forward(X)
    np.testing.assert_array_equal(inside, np.array(expect_inside, dtype=bool))
    assert np.all(np.isfinite(Y[inside]))
    np.testing.assert_allclose(t.inverse(Y[inside]), X[inside], rtol=1e-12)


@pytest.mark.parametrize("kind, x, slope", [
    # derivatives written out by hand: d log x = 1/x, d log1p x = 1/(1+x),
    # d logit x = 1/(x(1-x))
    ("log", np.array([0.1, 1.0, 7.0]), lambda x: 1 / x),
    ("log1p", np.array([0.0, 1.0, 7.0]), lambda x: 1 / (1 + x)),
    ("logit", np.array([0.1, 0.5, 0.97]), lambda x: 1 / (x * (1 - x))),
])
def test_log_jacobian_of_fixed_transforms(kind, x, slope):
    t = FeatureTransforms.from_kinds([kind])
    np.testing.assert_allclose(t.log_jacobian(x[:, None]), np.log(slope(x)), rtol=1e-13)
    Y, _ = t.forward(x[:, None])
    np.testing.assert_allclose(t.log_jacobian_from_transformed(Y), np.log(slope(x)),
                               rtol=1e-12)


def test_log_density_in_data_units_against_scipy():
    rng = np.random.default_rng(5)
    # two components in transformed units, features: log, logit, yeo-johnson, none
    means = np.array([[0.2, -1.0, 0.5, 3.0], [1.5, 0.8, -0.4, -2.0]])
    A = rng.normal(size=(2, 4, 4))
    covs = A @ A.transpose(0, 2, 1) * 0.3 + np.eye(4) * 0.2
    weights = np.array([0.35, 0.65])
    mixture = Mixture.from_parameters(weights, means, covs, covariance="full")
    t = FeatureTransforms(("log", "logit", "yeo-johnson", "none"),
                          np.array([np.nan, np.nan, 0.6, np.nan]))
    Y = rng.normal(size=(50, 4)) + means[0]
    X = t.inverse(Y)
    got = data_log_density(mixture, t, X)
    # reference: scipy.stats.multivariate_normal on the transformed rows, plus the
    # log-Jacobian written out per feature
    dens = sum(w * stats.multivariate_normal(m, c).pdf(Y) for w, m, c in
               zip(weights, means, covs))
    jac = (-np.log(X[:, 0]) - np.log(X[:, 1]) - np.log1p(-X[:, 1])
           + (0.6 - 1) * np.sign(X[:, 2]) * np.log1p(np.abs(X[:, 2])))
    np.testing.assert_allclose(got, np.log(dens) + jac, rtol=1e-10)


def test_one_component_log_case_is_lognormal():
    mu, sdlog = 0.7, 0.8
    mixture = Mixture.from_parameters([1.0], [[mu]], [[[sdlog**2]]], covariance="full")
    t = FeatureTransforms.from_kinds(["log"])
    x = np.random.default_rng(6).lognormal(mu, sdlog, 200)
    got = data_log_density(mixture, t, x[:, None])
    # reference: scipy.stats.lognorm with s = sdlog and scale = exp(mu)
    np.testing.assert_allclose(got, stats.lognorm(s=sdlog, scale=np.exp(mu)).logpdf(x),
                               rtol=1e-10)
    # outside the domain: NaN, not an error
    out = data_log_density(mixture, t, np.array([[0.0], [-1.0], [2.0]]))
    assert np.isnan(out[:2]).all() and np.isfinite(out[2])


def test_bad_names_and_unfitted_use_are_clear():
    from shoal.core import ModelError
    with pytest.raises(ModelError, match="transforms should be among"):
        FeatureTransforms.from_kinds(["sqrt"])
    t = FeatureTransforms.from_kinds(["yeo-johnson"])
    with pytest.raises(ModelError, match="not fitted"):
        t.forward(np.ones((3, 1)))
    with pytest.raises(ModelError, match="two distinct"):
        fit_yeo_johnson(np.ones(10))
