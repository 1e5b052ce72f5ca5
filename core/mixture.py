"""The Gaussian mixture kept as sufficient statistics, scored and updated stepwise.

Units. Rows arrive in the data's own units ``x``. The mixture works in standardised
units ``z = (x - center) / scale`` with ``center`` and ``scale`` frozen at warm-up,
so that second moments kept about that pivot do not lose precision when the data sit
far from zero. ``log p(x) = log p(z) - sum(log scale)``; means and covariances are
reported back in data units by :meth:`Mixture.data_means` and friends.

State. Per component ``k``: ``s0[k]`` (share of mass), ``s1[k]`` (mass-weighted mean
of z) and ``s2[k]`` (mass-weighted second moment of z: matrix, diagonal or scalar),
all running averages over the stream. Parameters (weights, means, covariances,
precision Cholesky factors) are derived from the statistics at every global multiple
of ``refresh_rows`` learned rows. Rows between two refreshes are scored with the same
parameters whatever the file boundaries, so the same stream cut into different files
ends in the same model.

:class:`Mixture` holds the state; its methods are one-line calls into the kernels of
:mod:`~shoal.core.learning` (score, learn, batch EM step), :mod:`~shoal.core.parameters`
(statistics to parameters) and :mod:`~shoal.core.state` (save and restore).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

from . import fused, learning, parameters, state
from .covariance import COVARIANCE_TYPES, FAMILIES
from .errors import ModelError
from .schedule import StepSchedule
from .scoring import Scores, checked_rows

__all__ = ["Mixture", "Scores", "FORMAT_VERSION"]

FORMAT_VERSION = state.FORMAT_VERSION


@dataclass(frozen=True, eq=False)
class Mixture:
    """A Gaussian mixture held as sufficient statistics (immutable; updates return copies).

    Build one with :func:`shoal.core.initialise` or :meth:`from_parameters`; restore one
    with :meth:`from_state`.

    Attributes
    ----------
    covariance : {"full", "diag", "spherical"}
    center, scale : ndarray of shape (n_features,)
        The standardisation frozen at warm-up: ``z = (x - center) / scale``.
    s0 : ndarray of shape (n_components,)
    s1 : ndarray of shape (n_components, n_features)
    s2 : ndarray of shape (n_components, n_features, n_features), (n_components,
        n_features) or (n_components,)
        The running statistics (standardised units), second moments as the
        covariance type keeps them.
    weights : ndarray of shape (n_components,)
    means : ndarray of shape (n_components, n_features)
        Standardised units.
    covariances : ndarray, the shape of ``s2``
        Standardised units.
    ids : ndarray of shape (n_components,)
        Stable segment ids (int64); ``next_id`` is the next one to give.
    schedule : StepSchedule
    n_rows : int
        Rows learned since warm-up.
    sumsq : float
        Sum of squared row weights: ``1 / n_eff``.
    reg_covar, prior_weight : float
        Added to the covariance diagonals; rows' worth of the identity prior.
    resp_floor : float
        Responsibilities under it count as zero when learning.
    refresh_rows : int
        Parameters are derived at every global multiple of this many learned rows.
    mass_floor : float
        Weight under which :meth:`low_mass` lists a component.
    averaging : bool
        Polyak-Ruppert averaging of the statistics at refresh points (``avg_s0``,
        ``avg_s1``, ``avg_s2`` over ``avg_count`` refreshes).
    prec_chol : ndarray
        Precision Cholesky factors (full: (n_components, n_features, n_features)) or
        ``1 / sqrt(variances)``.
    log_det : ndarray of shape (n_components,)
        ``log det`` of ``prec_chol``.
    """

    covariance: str
    center: np.ndarray          # (D,)
    scale: np.ndarray           # (D,)
    s0: np.ndarray              # (K,)
    s1: np.ndarray              # (K, D)
    s2: np.ndarray              # (K, D, D) | (K, D) | (K,)
    weights: np.ndarray         # (K,)
    means: np.ndarray           # (K, D), standardised units
    covariances: np.ndarray     # (K, D, D) | (K, D) | (K,), standardised units
    ids: np.ndarray             # (K,) int64
    next_id: int
    schedule: StepSchedule
    n_rows: int = 0
    sumsq: float = 1.0          # sum of squared row weights: 1 / Kish effective rows
    reg_covar: float = 1e-6
    prior_weight: float = 1e-3
    resp_floor: float = 0.0
    refresh_rows: int = 4096
    mass_floor: float = 1e-3
    averaging: bool = False
    avg_s0: np.ndarray = field(default=None, repr=False)
    avg_s1: np.ndarray = field(default=None, repr=False)
    avg_s2: np.ndarray = field(default=None, repr=False)
    avg_count: int = 0
    prec_chol: np.ndarray = field(default=None, repr=False)
    log_det: np.ndarray = field(default=None, repr=False)

    def __post_init__(self):
        if self.avg_s0 is None:
            object.__setattr__(self, "avg_s0", np.zeros_like(self.s0))
            object.__setattr__(self, "avg_s1", np.zeros_like(self.s1))
            object.__setattr__(self, "avg_s2", np.zeros_like(self.s2))
        if self.prec_chol is None:
            if self.covariance == "full" and fused.enabled():
                # the factor as the compiled refresh computes it, so that a restored
                # mixture scores exactly as the one that was saved
                prec_chol, log_det = fused.factor(self.covariances)
            else:
                family = FAMILIES[self.covariance]
                prec_chol = family.precision_cholesky(self.covariances)
                log_det = family.log_det(prec_chol, self.n_features)
            object.__setattr__(self, "prec_chol", prec_chol)
            object.__setattr__(self, "log_det", log_det)

    # ------------------------------------------------------------------ shape
    @property
    def n_components(self) -> int:
        """Number of components ``K``."""
        return int(self.s0.shape[0])

    @property
    def n_features(self) -> int:
        """Number of features ``D``."""
        return int(self.center.shape[0])

    @property
    def family(self):
        """The covariance type's kernels (:data:`shoal.core.covariance.FAMILIES`)."""
        return FAMILIES[self.covariance]

    @property
    def n_eff(self) -> float:
        """Kish's effective number of rows behind the statistics."""
        return 1.0 / self.sumsq

    @property
    def log_scale_sum(self) -> float:
        """``sum(log scale)``: what turns a standardised log-density into data units."""
        return float(np.sum(np.log(self.scale)))

    @cached_property
    def scoring_operator(self):
        """Parameters packed for scoring (computed once per parameter set)."""
        if fused.enabled():
            return fused.scoring_operator(self)
        return self.family.scoring_operator(self.means, self.prec_chol, np.log(self.weights))

    @cached_property
    def packed_operator(self) -> np.ndarray:
        """The full type's whitening operator packed for the compiled tiled kernel."""
        return fused.packed_operator(self)

    # ------------------------------------------------------------- build
    @classmethod
    def from_parameters(
        cls,
        weights,
        means,
        covariances,
        *,
        covariance="full",
        center=None,
        scale=None,
        n_eff=1.0e4,
        schedule=None,
        reg_covar=1e-6,
        prior_weight=1e-3,
        resp_floor=0.0,
        refresh_rows=4096,
        mass_floor=1e-3,
        ids=None,
    ) -> "Mixture":
        """A mixture with the given parameters in data units, statistics to match.

        Parameters
        ----------
        weights : array-like of shape (n_components,)
        means : array-like of shape (n_components, n_features)
        covariances : array-like of shape (n_components, n_features, n_features),
            (n_components, n_features) or (n_components,)
            For full, diag and spherical.
        covariance : {"full", "diag", "spherical"}
        center, scale : array-like of shape (n_features,), optional
            The standardisation (default: none). A spherical mixture needs equal
            ``scale`` in every feature.
        n_eff : float
            Effective rows the statistics stand for.
        schedule : StepSchedule, optional
        reg_covar, prior_weight, resp_floor, refresh_rows, mass_floor, ids
            As the fields of the same names.

        Returns
        -------
        mixture : Mixture
        """
        if covariance not in FAMILIES:
            raise ModelError(
                f"covariance should be one of {COVARIANCE_TYPES}, got {covariance!r}"
            )
        weights = np.asarray(weights, dtype=np.float64)
        means = np.asarray(means, dtype=np.float64)
        covariances = np.asarray(covariances, dtype=np.float64)
        if means.ndim != 2:
            raise ModelError(f"means should have shape (K, D), got {means.shape}")
        n_components, n_features = means.shape
        expected = {
            "full": (n_components, n_features, n_features),
            "diag": (n_components, n_features),
            "spherical": (n_components,),
        }[covariance]
        if weights.shape != (n_components,):
            raise ModelError(f"weights should have shape ({n_components},), got {weights.shape}")
        if covariances.shape != expected:
            raise ModelError(f"covariances should have shape {expected}, got {covariances.shape}")
        center = np.zeros(n_features) if center is None else np.asarray(center, np.float64)
        scale = np.ones(n_features) if scale is None else np.asarray(scale, np.float64)
        if covariance == "spherical" and not np.all(scale == scale[0]):
            raise ModelError("a spherical mixture needs the same scale for every feature")
        zmeans = (means - center) / scale
        if covariance == "full":
            zcov = covariances / np.outer(scale, scale)
            s2 = zcov + zmeans[:, :, None] * zmeans[:, None, :]
        elif covariance == "diag":
            zcov = covariances / scale**2
            s2 = zcov + zmeans**2
        else:
            zcov = covariances / scale[0] ** 2
            s2 = zcov + np.mean(zmeans**2, axis=1)
        w = weights / weights.sum()
        sched = (schedule or StepSchedule()).resolved(int(n_eff))
        ids = np.arange(n_components, dtype=np.int64) if ids is None else np.asarray(ids, np.int64)
        return cls(
            covariance=covariance, center=center, scale=scale,
            s0=w.copy(), s1=w[:, None] * zmeans,
            s2=w.reshape((-1,) + (1,) * (s2.ndim - 1)) * s2,
            weights=w, means=zmeans, covariances=zcov,
            ids=ids, next_id=int(ids.max()) + 1 if ids.size else 0, schedule=sched,
            sumsq=1.0 / float(n_eff), reg_covar=reg_covar, prior_weight=prior_weight,
            resp_floor=resp_floor, refresh_rows=refresh_rows, mass_floor=mass_floor,
        )

    # ------------------------------------------------------------ rows
    def standardise(self, X) -> np.ndarray:
        """Rows in standardised units.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
            Finite rows in the data's own units.

        Returns
        -------
        Z : ndarray of shape (n_samples, n_features)
            ``(X - center) / scale``.
        """
        return (checked_rows(self, X) - self.center) / self.scale

    @learning.retry_with_gaps()
    def score(self, X, *, _gaps=None) -> Scores:
        """Score rows without learning from them.

        Rows are scored in blocks of a few thousand, so memory beyond the outputs does
        not grow with ``len(X)``.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
            Rows in the data's own units; NaN marks a missing feature (the row is
            scored by the marginal over its observed features).

        Returns
        -------
        scores : Scores
        """
        return learning.score_rows(self, X, _gaps)

    def log_density(self, X) -> np.ndarray:
        """``log p(x)`` per row, in the data's own units.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
            NaN marks a missing feature.

        Returns
        -------
        log_density : ndarray of shape (n_samples,)
        """
        return self.score(X).log_density

    def component_log_density(self, X) -> np.ndarray:
        """Each component's log-density of each row, data units.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
            Finite rows.

        Returns
        -------
        log_density : ndarray of shape (n_samples, n_components)
            ``log N(x | mu_k, Sigma_k)``.
        """
        A = self.family.design(self.standardise(X))
        operator = self.family.scoring_operator(
            self.means, self.prec_chol, np.zeros(self.n_components)
        )
        return self.family.log_joint(A, operator).T - self.log_scale_sum

    @learning.retry_with_gaps()
    def learn(self, X, *, moments=False, scratch=None, _gaps=None) -> tuple["Mixture", Scores]:
        """Score rows, then learn from them with stepwise EM.

        Rows are taken in order. Each row is scored with the parameters in force at
        its position in the stream (they refresh every ``refresh_rows`` learned rows)
        and enters the statistics with the weight the step schedule gives it.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
            NaN marks a missing feature: the row is scored by the marginal over its
            observed features and learned from by EM with missing data.
        moments : bool, default False
            Also give the rows' per-segment moments in ``scores.moments``
            (:class:`shoal.core.piece_moments.PieceMoments`; complete rows, full and
            diag types), taken from the M-step's statistics for the drift watch.
        scratch : ScoreScratch, optional
            Buffers reused from call to call (:class:`shoal.core.scoring.ScoreScratch`):
            the scores are then valid only until the next call with it.

        Returns
        -------
        mixture : Mixture
            The updated mixture (``self`` is unchanged).
        scores : Scores
            The scores of every row, as labelled during learning.
        """
        return learning.learn_rows(self, X, _gaps, moments, scratch)

    @learning.retry_with_gaps(always_fill=True)
    def em_step(self, X, *, _gaps=None) -> tuple["Mixture", float]:
        """One full-batch EM iteration (step size 1) on ``X``.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
            NaN marks a missing feature (EM with missing data).

        Returns
        -------
        mixture : Mixture
            Statistics the batch averages, parameters derived from them.
        mean_log_density : float
            Per row of ``X`` under the parameters *before* the step (data units).
        """
        return learning.em_step_rows(self, X, _gaps)

    def derive(self, s0, s1, s2, sumsq) -> dict:
        """Parameters from statistics (standardised units).

        Parameters
        ----------
        s0, s1, s2, sumsq
            As for :func:`shoal.core.parameters.derive`.

        Returns
        -------
        params : dict
            As :func:`shoal.core.parameters.derive` returns them.
        """
        return parameters.derive(self, s0, s1, s2, sumsq)

    # the names the tests and older callers use
    _derive = derive

    def _evolve(self, **changes) -> "Mixture":
        """:func:`shoal.core.parameters.evolve`."""
        return parameters.evolve(self, **changes)

    # ------------------------------------------------------------- reporting
    def data_means(self) -> np.ndarray:
        """Component means in data units.

        Returns
        -------
        means : ndarray of shape (n_components, n_features)
        """
        return self.center + self.means * self.scale

    def data_covariance_matrices(self) -> np.ndarray:
        """Full covariance matrices in data units, whatever the covariance type.

        Returns
        -------
        covariances : ndarray of shape (n_components, n_features, n_features)
        """
        mats = self.family.matrices(self.covariances, self.n_features)
        return mats * np.outer(self.scale, self.scale)

    def data_covariances(self) -> np.ndarray:
        """Covariances in data units as the covariance type keeps them.

        Returns
        -------
        covariances : ndarray of shape (n_components, n_features, n_features) or (n_components, n_features)
            Matrices for full, per-feature variances for diag and spherical.
        """
        if self.covariance == "full":
            return self.data_covariance_matrices()
        var = self.covariances if self.covariance == "diag" else self.covariances[:, None]
        return var * self.scale**2

    def data_stds(self) -> np.ndarray:
        """Per-feature standard deviations of each component, data units.

        Returns
        -------
        stds : ndarray of shape (n_components, n_features)
        """
        mats = self.data_covariance_matrices()
        return np.sqrt(np.diagonal(mats, axis1=1, axis2=2))

    def low_mass(self, min_weight: float | None = None) -> np.ndarray:
        """Stable ids of the components whose weight is below ``min_weight``.

        Parameters
        ----------
        min_weight : float, optional
            Default: the mixture's ``mass_floor``.

        Returns
        -------
        ids : ndarray of shape (n_low,)
        """
        floor = self.mass_floor if min_weight is None else float(min_weight)
        return self.ids[self.weights < floor]

    def n_parameters(self) -> int:
        """Free parameters of the mixture (for BIC).

        Returns
        -------
        n_parameters : int
        """
        k, d = self.n_components, self.n_features
        return (k - 1) + k * d + self.family.n_parameters(k, d)

    # --------------------------------------------------------- serialisation
    def to_state(self) -> tuple[dict, dict]:
        """A flat mapping of numeric arrays and a JSON-able metadata dict (no pickle).

        Returns
        -------
        arrays : dict of str to ndarray
        meta : dict
            See :func:`shoal.core.state.write_state`.
        """
        return state.write_state(self)

    @classmethod
    def from_state(cls, arrays: dict, meta: dict) -> "Mixture":
        """Rebuild a mixture saved by :meth:`to_state`; the round trip is exact.

        Parameters
        ----------
        arrays, meta
            As for :func:`shoal.core.state.read_state`.

        Returns
        -------
        mixture : Mixture
        """
        return cls(**state.read_state(arrays, meta))
