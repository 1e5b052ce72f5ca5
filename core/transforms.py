"""Per-feature transforms applied before the mixture, and their way back.

Skewed, bounded and counted features are not Gaussian in their own units; a monotone
transform per feature makes them closer to it, the mixture is fitted in the
transformed units, and everything shown to people is mapped back.

Transforms (``y = T(x)``, ``log |T'(x)|`` the log-Jacobian per feature):

``none``
    ``y = x``; every finite ``x``; log-Jacobian 0.
``log``
    ``y = log x``; ``x > 0``; log-Jacobian ``-log x``.
``log1p``
    ``y = log(1 + x)``; ``x > -1``; log-Jacobian ``-log(1 + x)``.
``logit``
    ``y = log(x / (1 - x))``; ``0 < x < 1``; log-Jacobian ``-log x - log(1 - x)``.
``yeo-johnson``
    Yeo & Johnson (2000), "A new family of power transformations to improve
    normality or symmetry", Biometrika 87(4)::

        y = ((1 + x)^l - 1) / l              x >= 0, l != 0
        y = log(1 + x)                       x >= 0, l == 0
        y = -((1 - x)^(2 - l) - 1) / (2 - l) x < 0,  l != 2
        y = -log(1 - x)                      x < 0,  l == 2

    every finite ``x``; log-Jacobian ``(l - 1) sign(x) log(1 + |x|)``. The parameter
    ``l`` is fitted once by maximum likelihood (:func:`fit_yeo_johnson`) and then kept.

A row is inside the domain when every feature is inside its transform's domain and
the transformed value is finite; domain checks return masks and never raise on data.
The density of a row in the data's units is the density of its transformed row plus
the sum of the log-Jacobians (change of variables).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize, special

from .errors import ModelError

__all__ = [
    "TRANSFORMS",
    "FeatureTransforms",
    "yeo_johnson",
    "yeo_johnson_inverse",
    "yeo_johnson_log_jacobian",
    "yeo_johnson_log_likelihood",
    "fit_yeo_johnson",
    "skewness",
    "data_log_density",
]

TRANSFORMS = ("none", "log", "log1p", "logit", "yeo-johnson")


# ----------------------------------------------------------------- Yeo-Johnson
def yeo_johnson(x, lmbda: float) -> np.ndarray:
    """The Yeo-Johnson transform of ``x`` with parameter ``lmbda``.

    Parameters
    ----------
    x : ndarray of shape (n_samples,)
    lmbda : float

    Returns
    -------
    y : ndarray of shape (n_samples,)
        By ``expm1``/``log1p``, so that ``lmbda`` near 0 or 2 loses no precision.
    """
    x = np.asarray(x, dtype=np.float64)
    y = np.empty_like(x)
    pos = x >= 0
    xp, xn = x[pos], x[~pos]
    if abs(lmbda) < 1e-12:
        y[pos] = np.log1p(xp)
    else:
        y[pos] = np.expm1(lmbda * np.log1p(xp)) / lmbda
    if abs(lmbda - 2.0) < 1e-12:
        y[~pos] = -np.log1p(-xn)
    else:
        y[~pos] = -np.expm1((2.0 - lmbda) * np.log1p(-xn)) / (2.0 - lmbda)
    return y


def yeo_johnson_inverse(y, lmbda: float) -> np.ndarray:
    """``x`` such that ``yeo_johnson(x, lmbda) == y``; NaN where ``y`` is outside the
    transform's range (``lmbda < 0``: ``y < -1 / lmbda``; ``lmbda > 2``:
    ``y > -1 / (2 - lmbda)``).

    Parameters
    ----------
    y : ndarray of shape (n_samples,)
    lmbda : float

    Returns
    -------
    x : ndarray of shape (n_samples,)
    """
    y = np.asarray(y, dtype=np.float64)
    x = np.empty_like(y)
    pos = y >= 0
    yp, yn = y[pos], y[~pos]
    with np.errstate(invalid="ignore", divide="ignore"):
        if abs(lmbda) < 1e-12:
            x[pos] = np.expm1(yp)
        else:
            x[pos] = np.expm1(np.log1p(lmbda * yp) / lmbda)
        if abs(lmbda - 2.0) < 1e-12:
            x[~pos] = -np.expm1(-yn)
        else:
            x[~pos] = -np.expm1(np.log1p(-(2.0 - lmbda) * yn) / (2.0 - lmbda))
    return x


def yeo_johnson_log_jacobian(x, lmbda: float) -> np.ndarray:
    """``log |dy/dx|`` of the Yeo-Johnson transform, ``(lmbda - 1) sign(x) log1p(|x|)``.

    Parameters
    ----------
    x : ndarray of shape (n_samples,)
    lmbda : float

    Returns
    -------
    log_jacobian : ndarray of shape (n_samples,)
    """
    x = np.asarray(x, dtype=np.float64)
    return (lmbda - 1.0) * np.sign(x) * np.log1p(np.abs(x))


def yeo_johnson_log_likelihood(x, lmbda: float) -> float:
    """The profile log-likelihood of ``lmbda`` (Yeo & Johnson 2000, section 3):
    ``-n/2 log(sigma^2(lmbda)) + (lmbda - 1) sum sign(x) log1p(|x|)``, with
    ``sigma^2`` the maximum-likelihood variance of the transformed values; the
    Gaussian's mean and variance are profiled out and constants dropped.

    Parameters
    ----------
    x : ndarray of shape (n_samples,)
    lmbda : float
    """
    x = np.asarray(x, dtype=np.float64)
    y = yeo_johnson(x, lmbda)
    var = np.mean((y - np.mean(y)) ** 2)
    if not np.isfinite(var) or var <= 0.0:
        return -np.inf
    return float(-0.5 * x.size * np.log(var) + np.sum(yeo_johnson_log_jacobian(x, lmbda)))


def fit_yeo_johnson(x) -> float:
    """The maximum-likelihood Yeo-Johnson parameter of ``x``.

    The profile log-likelihood (:func:`yeo_johnson_log_likelihood`) is maximised over
    the interval of ``lmbda`` in which values up to 20 times the largest ``|x|``
    transform without overflow or underflow in half the float exponent range (the
    bounds scipy's ``yeojohnson_normmax`` uses), to ``xtol`` 1.48e-8.

    Parameters
    ----------
    x : ndarray of shape (n_samples,)
        Finite values, at least two distinct.

    Raises
    ------
    ModelError
        When ``x`` has fewer than two distinct finite values.
    """
    x = np.asarray(x, dtype=np.float64).ravel()
    if x.size < 2 or not np.all(np.isfinite(x)) or np.ptp(x) == 0.0:
        raise ModelError("the Yeo-Johnson parameter needs at least two distinct finite values")
    log1p_max = np.log1p(20.0 * np.max(np.abs(x)))
    eps, info = np.finfo(np.float64).eps, np.finfo(np.float64)
    lo = (np.log(info.tiny) - np.log(eps)) / 2.0 / log1p_max
    hi = (np.log(info.max) + np.log(eps)) / 2.0 / log1p_max
    if np.all(x < 0):
        lo, hi = 2.0 - hi, 2.0 - lo
    elif np.any(x < 0):
        lo, hi = max(2.0 - hi, lo), min(2.0 - lo, hi)

    def negative(lmbda):
        value = yeo_johnson_log_likelihood(x, lmbda)
        return -value if np.isfinite(value) else np.inf

    return float(optimize.fminbound(negative, lo, hi, xtol=1.48e-8))


def skewness(x) -> float:
    """The sample skewness ``m3 / m2^1.5`` of ``x`` (0 for constant values)."""
    x = np.asarray(x, dtype=np.float64)
    d = x - np.mean(x)
    m2 = np.mean(d * d)
    if m2 <= 0.0:
        return 0.0
    return float(np.mean(d**3) / m2**1.5)


# ------------------------------------------------------------ per-feature kernels
def _none(x, lmbda):
    return x.copy()


def _log(x, lmbda):
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.log(x)


def _log1p(x, lmbda):
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.log1p(x)


def _logit(x, lmbda):
    with np.errstate(divide="ignore", invalid="ignore"):
        return special.logit(x)


def _jac_none(x, lmbda):
    return np.zeros_like(x)


def _jac_log(x, lmbda):
    return -np.log(x)


def _jac_log1p(x, lmbda):
    return -np.log1p(x)


def _jac_logit(x, lmbda):
    return -np.log(x) - np.log1p(-x)


def _inside_all(x):
    return np.isfinite(x)


# one entry per transform: forward, inverse, log-Jacobian, domain (finite x inside)
_KERNELS = {
    "none": (_none, lambda y, l: np.array(y, dtype=np.float64), _jac_none, _inside_all),
    "log": (_log, lambda y, l: np.exp(y), _jac_log, lambda x: x > 0),
    "log1p": (_log1p, lambda y, l: np.expm1(y), _jac_log1p, lambda x: x > -1),
    "logit": (_logit, lambda y, l: special.expit(y), _jac_logit, lambda x: (x > 0) & (x < 1)),
    "yeo-johnson": (yeo_johnson, yeo_johnson_inverse, yeo_johnson_log_jacobian, _inside_all),
}


@dataclass(frozen=True, eq=False)
class FeatureTransforms:
    """The transform of every feature, with the fitted Yeo-Johnson parameters.

    Attributes
    ----------
    kinds : tuple of str, length n_features
        One of :data:`TRANSFORMS` per feature.
    lambdas : ndarray of shape (n_features,)
        The Yeo-Johnson parameter of each ``yeo-johnson`` feature once fitted; NaN
        elsewhere and before :meth:`fit`.
    """

    kinds: tuple
    lambdas: np.ndarray

    @classmethod
    def from_kinds(cls, kinds) -> "FeatureTransforms":
        """Transforms by name, Yeo-Johnson parameters not fitted yet."""
        kinds = tuple(kinds)
        unknown = [k for k in kinds if k not in _KERNELS]
        if unknown:
            raise ModelError(f"transforms should be among {TRANSFORMS}, got {unknown[0]!r}")
        return cls(kinds, np.full(len(kinds), np.nan))

    @property
    def n_features(self) -> int:
        return len(self.kinds)

    @property
    def identity(self) -> bool:
        """True when every feature is left as it is."""
        return all(k == "none" for k in self.kinds)

    @property
    def fitted(self) -> bool:
        """True unless a ``yeo-johnson`` feature still needs its parameter."""
        return not any(k == "yeo-johnson" and not np.isfinite(l)
                       for k, l in zip(self.kinds, self.lambdas))

    def fit(self, X) -> "FeatureTransforms":
        """Fit the Yeo-Johnson parameter of every ``yeo-johnson`` feature on ``X``.

        Parameters
        ----------
        X : ndarray of shape (n_samples, n_features)
            Finite rows in the data's units (e.g. the warm-up rows).
        """
        X = self._check(X)
        lambdas = self.lambdas.copy()
        for j, kind in enumerate(self.kinds):
            if kind == "yeo-johnson":   # on the values present (NaN: a missing value)
                col = X[:, j]
                lambdas[j] = fit_yeo_johnson(col[~np.isnan(col)])
        return FeatureTransforms(self.kinds, lambdas)

    def inside(self, X) -> np.ndarray:
        """Rows whose every feature lies inside its transform's domain.

        Parameters
        ----------
        X : ndarray of shape (n_samples, n_features)

        Returns
        -------
        inside : ndarray of shape (n_samples,), bool
            False for a value outside the domain and for a NaN or infinite value.
        """
        X = self._check(X)
        ok = np.ones(X.shape[0], dtype=bool)
        with np.errstate(invalid="ignore"):
            for j, kind in enumerate(self.kinds):
                col = X[:, j]
                ok &= np.isfinite(col) & _KERNELS[kind][3](col)
        return ok

    def forward(self, X) -> tuple[np.ndarray, np.ndarray]:
        """Transformed rows and the mask of rows inside the domain.

        Parameters
        ----------
        X : ndarray of shape (n_samples, n_features)
            Rows in the data's units (NaN allowed: such rows come back outside).

        Returns
        -------
        Y : ndarray of shape (n_samples, n_features)
            Transformed rows; values of rows outside the domain are unspecified.
        inside : ndarray of shape (n_samples,), bool
            Every feature inside its domain and every transformed value finite.
        """
        X = self._check(X)
        self._need_fit()
        Y = np.empty_like(X)
        inside = self.inside(X)
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            for j, kind in enumerate(self.kinds):
                Y[:, j] = _KERNELS[kind][0](X[:, j], self.lambdas[j])
        inside &= np.all(np.isfinite(Y), axis=1)
        return Y, inside

    def inside_observed(self, X) -> np.ndarray:
        """:meth:`inside` with NaN as a missing value: a row is inside when every value
        present is finite and inside its transform's domain.

        Parameters
        ----------
        X : ndarray of shape (n_samples, n_features)

        Returns
        -------
        inside : ndarray of shape (n_samples,), bool
        """
        X = self._check(X)
        ok = np.ones(X.shape[0], dtype=bool)
        with np.errstate(invalid="ignore"):
            for j, kind in enumerate(self.kinds):
                col = X[:, j]
                ok &= np.isnan(col) | (np.isfinite(col) & _KERNELS[kind][3](col))
        return ok

    def forward_observed(self, X) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """:meth:`forward` and :meth:`log_jacobian` of rows with missing values (NaN).

        A missing value stays NaN and adds nothing to the log-Jacobian: the density of
        the values present is the marginal of the observed features, whose Jacobian is
        that of those features alone.

        Parameters
        ----------
        X : ndarray of shape (n_samples, n_features)

        Returns
        -------
        Y : ndarray of shape (n_samples, n_features)
            Transformed rows, NaN where ``X`` is NaN.
        inside : ndarray of shape (n_samples,), bool
            Every value present inside its domain, with a finite transform.
        log_jacobian : ndarray of shape (n_samples,)
            Sum over the values present (0 for a row outside).
        """
        X = self._check(X)
        self._need_fit()
        Y = np.empty_like(X)
        inside = self.inside_observed(X)
        jac = np.zeros(X.shape[0])
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            for j, kind in enumerate(self.kinds):
                col = X[:, j]
                Y[:, j] = _KERNELS[kind][0](col, self.lambdas[j])
                inside &= np.isnan(col) | np.isfinite(Y[:, j])
            for j, kind in enumerate(self.kinds):
                if kind != "none":
                    col = X[:, j]
                    term = _KERNELS[kind][2](col, self.lambdas[j])
                    jac += np.where(np.isnan(col) | ~inside, 0.0, term)
        return Y, inside, jac

    def inverse(self, Y) -> np.ndarray:
        """Rows back in the data's units (NaN outside a transform's range).

        Parameters
        ----------
        Y : ndarray of shape (n_samples, n_features) or (n_features,)

        Returns
        -------
        X : ndarray of the shape of ``Y``
        """
        Y = np.asarray(Y, dtype=np.float64)
        one = Y.ndim == 1
        Y2 = self._check(Y[None, :] if one else Y)
        self._need_fit()
        X = np.empty_like(Y2)
        with np.errstate(over="ignore", invalid="ignore"):
            for j, kind in enumerate(self.kinds):
                X[:, j] = _KERNELS[kind][1](Y2[:, j], self.lambdas[j])
        return X[0] if one else X

    def log_jacobian(self, X) -> np.ndarray:
        """``sum_j log |T_j'(x_j)|`` per row: add it to the log-density of the
        transformed row to get the log-density in the data's units.

        Parameters
        ----------
        X : ndarray of shape (n_samples, n_features)
            Rows inside the domain, in the data's units.

        Returns
        -------
        log_jacobian : ndarray of shape (n_samples,)
        """
        X = self._check(X)
        self._need_fit()
        total = np.zeros(X.shape[0])
        with np.errstate(divide="ignore", invalid="ignore"):
            for j, kind in enumerate(self.kinds):
                if kind != "none":
                    total += _KERNELS[kind][2](X[:, j], self.lambdas[j])
        return total

    def log_jacobian_from_transformed(self, Y) -> np.ndarray:
        """:meth:`log_jacobian` of the rows whose transforms are ``Y``.

        Parameters
        ----------
        Y : ndarray of shape (n_samples, n_features)

        Returns
        -------
        log_jacobian : ndarray of shape (n_samples,)
        """
        if self.identity:
            return np.zeros(np.asarray(Y).shape[0])
        return self.log_jacobian(self.inverse(Y))

    # ------------------------------------------------------------ serialisation
    def to_dict(self) -> dict:
        """JSON-able: ``{"kinds": [...], "lambdas": [float or None, ...]}``."""
        return {"kinds": list(self.kinds),
                "lambdas": [float(l) if np.isfinite(l) else None for l in self.lambdas]}

    @classmethod
    def from_dict(cls, data: dict) -> "FeatureTransforms":
        """Rebuild what :meth:`to_dict` gave."""
        kinds = tuple(data["kinds"])
        out = cls.from_kinds(kinds)
        lambdas = np.array([np.nan if l is None else float(l) for l in data["lambdas"]])
        if lambdas.shape != (len(kinds),):
            raise ModelError(f"transforms should have {len(kinds)} lambdas, got {lambdas.shape}")
        return cls(out.kinds, lambdas)

    # ------------------------------------------------------------------ checks
    def _check(self, X) -> np.ndarray:
        X = np.asarray(X, dtype=np.float64)
        if X.ndim != 2 or X.shape[1] != self.n_features:
            raise ModelError(f"X should have shape (n_samples, {self.n_features}), "
                             f"got {X.shape}")
        return X

    def _need_fit(self) -> None:
        if not self.fitted:
            raise ModelError("the Yeo-Johnson parameters are not fitted yet: call fit first")


def data_log_density(mixture, transforms: FeatureTransforms, X) -> np.ndarray:
    """``log p(x)`` in the data's units of a mixture fitted to transformed rows.

    ``log p_X(x) = log p_Y(T(x)) + sum_j log |T_j'(x_j)|`` (change of variables).

    Parameters
    ----------
    mixture : Mixture
        Fitted in the transformed units.
    transforms : FeatureTransforms
    X : ndarray of shape (n_samples, n_features)
        Rows in the data's units.

    Returns
    -------
    log_density : ndarray of shape (n_samples,)
        NaN for rows outside the transforms' domain.
    """
    Y, inside = transforms.forward(X)
    out = np.full(Y.shape[0], np.nan)
    if inside.any():
        rows = X[inside] if isinstance(X, np.ndarray) else np.asarray(X)[inside]
        out[inside] = mixture.log_density(Y[inside]) + transforms.log_jacobian(rows)
    return out
