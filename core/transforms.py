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
    Yeo & Johnson's power transform with a parameter ``l`` fitted once by maximum
    likelihood and then kept; every finite ``x`` (:mod:`shoal.core.yeo_johnson`).

A row is inside the domain when every feature is inside its transform's domain and
the transformed value is finite; domain checks return masks and never raise on data.
The density of a row in the data's units is the density of its transformed row plus
the sum of the log-Jacobians (change of variables).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, NamedTuple

import numpy as np
from scipy import special

from .errors import ModelError
from .yeo_johnson import (
    fit_yeo_johnson,
    yeo_johnson,
    yeo_johnson_inverse,
    yeo_johnson_log_jacobian,
    yeo_johnson_log_likelihood,
)

# The Yeo-Johnson functions are re-exported: the service imports them from here.
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


def skewness(x) -> float:
    """The sample skewness ``m3 / m2^1.5`` of ``x``.

    Parameters
    ----------
    x : array_like of shape (n_samples,)

    Returns
    -------
    skewness : float
        0 for constant values.
    """
    x = np.asarray(x, dtype=np.float64)
    d = x - np.mean(x)
    m2 = np.mean(d * d)
    if m2 <= 0.0:
        return 0.0
    return float(np.mean(d**3) / m2**1.5)


class _Kernels(NamedTuple):
    """One transform's functions of a column: ``forward(x, lmbda)``,
    ``inverse(y, lmbda)``, ``log_jacobian(x, lmbda)`` and ``domain(x)``, the mask of
    finite ``x`` inside the domain. Callers set the floating-point error state."""

    forward: Callable
    inverse: Callable
    log_jacobian: Callable
    domain: Callable


def _without_parameter(forward, inverse, log_jacobian, domain) -> _Kernels:
    """Kernels of a transform without a parameter (``lmbda`` is ignored)."""
    return _Kernels(lambda x, _: forward(x), lambda y, _: inverse(y),
                    lambda x, _: log_jacobian(x), domain)


_KERNELS = {
    "none": _without_parameter(np.copy, lambda y: np.array(y, dtype=np.float64),
                               np.zeros_like, np.isfinite),
    "log": _without_parameter(np.log, np.exp, lambda x: -np.log(x), lambda x: x > 0),
    "log1p": _without_parameter(np.log1p, np.expm1, lambda x: -np.log1p(x),
                                lambda x: x > -1),
    "logit": _without_parameter(special.logit, special.expit,
                                lambda x: -np.log(x) - np.log1p(-x),
                                lambda x: (x > 0) & (x < 1)),
    "yeo-johnson": _Kernels(yeo_johnson, yeo_johnson_inverse, yeo_johnson_log_jacobian,
                            np.isfinite),
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
        """Transforms by name, Yeo-Johnson parameters not fitted yet.

        Parameters
        ----------
        kinds : sequence of str, length n_features
            One of :data:`TRANSFORMS` per feature.

        Returns
        -------
        transforms : FeatureTransforms

        Raises
        ------
        ModelError
            For a name not in :data:`TRANSFORMS`.
        """
        kinds = tuple(kinds)
        unknown = [k for k in kinds if k not in _KERNELS]
        if unknown:
            raise ModelError(f"transforms should be among {TRANSFORMS}, got {unknown[0]!r}")
        return cls(kinds, np.full(len(kinds), np.nan))

    @property
    def n_features(self) -> int:
        """The number of features transformed."""
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
            Rows in the data's units (e.g. the warm-up rows); NaN is a missing value
            and is left out of the fit.

        Returns
        -------
        transforms : FeatureTransforms
            A new object with every ``yeo-johnson`` parameter fitted; ``self`` is left
            as it is.
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
            Rows in the data's units.

        Returns
        -------
        inside : ndarray of shape (n_samples,), bool
            False for a value outside the domain and for a NaN or infinite value.
        """
        return self._inside(self._check(X), missing_ok=False)

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
        return self._inside(self._check(X), missing_ok=True)

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
        Y = self._forward(X)
        return Y, self._inside(X, missing_ok=False) & np.all(np.isfinite(Y), axis=1)

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
        Y = self._forward(X)
        missing = np.isnan(X)
        inside = self._inside(X, missing_ok=True) & np.all(missing | np.isfinite(Y), axis=1)
        return Y, inside, self._log_jacobian(X, skip=missing | ~inside[:, None])

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
                X[:, j] = _KERNELS[kind].inverse(Y2[:, j], self.lambdas[j])
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
        return self._log_jacobian(X)

    def log_jacobian_from_transformed(self, Y) -> np.ndarray:
        """:meth:`log_jacobian` of the rows whose transforms are ``Y``.

        Parameters
        ----------
        Y : ndarray of shape (n_samples, n_features)
            Rows in the transformed units (as the model sees them).

        Returns
        -------
        log_jacobian : ndarray of shape (n_samples,)
        """
        if self.identity:
            return np.zeros(np.asarray(Y).shape[0])
        return self.log_jacobian(self.inverse(Y))

    # ------------------------------------------------------------ serialisation
    def to_dict(self) -> dict:
        """The transforms as plain data, for a checkpoint's JSON.

        Returns
        -------
        data : dict
            ``{"kinds": [str, ...], "lambdas": [float or None, ...]}``, ``None`` for a
            parameter not fitted or not used.
        """
        return {"kinds": list(self.kinds),
                "lambdas": [float(l) if np.isfinite(l) else None for l in self.lambdas]}

    @classmethod
    def from_dict(cls, data: dict) -> "FeatureTransforms":
        """Rebuild what :meth:`to_dict` gave.

        Parameters
        ----------
        data : dict
            ``{"kinds": [...], "lambdas": [...]}`` with one lambda per kind.

        Returns
        -------
        transforms : FeatureTransforms
        """
        kinds = tuple(data["kinds"])
        out = cls.from_kinds(kinds)
        lambdas = np.array([np.nan if l is None else float(l) for l in data["lambdas"]])
        if lambdas.shape != (len(kinds),):
            raise ModelError(f"transforms should have {len(kinds)} lambdas, got {lambdas.shape}")
        return cls(out.kinds, lambdas)

    # ------------------------------------------------------------- column loops
    def _inside(self, X, missing_ok: bool) -> np.ndarray:
        ok = np.ones(X.shape[0], dtype=bool)
        with np.errstate(invalid="ignore"):
            for j, kind in enumerate(self.kinds):
                col = X[:, j]
                here = np.isfinite(col) & _KERNELS[kind].domain(col)
                ok &= (np.isnan(col) | here) if missing_ok else here
        return ok

    def _forward(self, X) -> np.ndarray:
        Y = np.empty_like(X)
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            for j, kind in enumerate(self.kinds):
                Y[:, j] = _KERNELS[kind].forward(X[:, j], self.lambdas[j])
        return Y

    def _log_jacobian(self, X, skip=None) -> np.ndarray:
        """Sum of the log-Jacobians per row; values where ``skip`` (n, D) add nothing."""
        total = np.zeros(X.shape[0])
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            for j, kind in enumerate(self.kinds):
                if kind != "none":
                    term = _KERNELS[kind].log_jacobian(X[:, j], self.lambdas[j])
                    total += term if skip is None else np.where(skip[:, j], 0.0, term)
        return total

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
