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
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from functools import cached_property, wraps

import numpy as np

from . import fused, missing
from .missing import Gaps
from .covariance import (
    COVARIANCE_TYPES,
    FAMILIES,
    LOG_2PI,
    non_positive_variance,
    not_positive_definite,
)
from .errors import ModelError
from .schedule import StepSchedule

__all__ = ["Mixture", "Scores", "FORMAT_VERSION"]

FORMAT_VERSION = 1
BLOCK_ROWS = 2048  # rows scored at once: the (K*D, rows) intermediate stays in cache
FUSED_ROWS = 1024  # rows per block on the compiled path: its (K*D, rows) whitened block stays in L2
LINEAR_ROWS = 4096  # the same for diag and spherical (no whitened block: fewer, longer calls)
SPAN_ROWS = 8192   # rows whose design matrix is kept for the moments (score-only paths)
_TINY = 10.0 * np.finfo(np.float64).eps
_DESIGN_KIND = {"full": 0, "diag": 1, "spherical": 2}   # core/_kernels.c design()
_PARAMETERS = frozenset({"weights", "means", "covariances", "prec_chol", "log_det"})
_NOT_FINITE = "X contains NaN or infinite values; drop or mark those rows first"


# ------------------------------------------------------ rows with missing features
class _MissingValues(ModelError):
    """Raised inside the complete-row paths when a row holds NaN; the public methods
    catch it and start again with the rows' gaps filled and marked (:func:`_gap_aware`).
    A ModelError, so that a path that does not handle gaps refuses them as before."""


def _not_finite(X) -> ModelError:
    """The error for rows with a non-finite value: :func:`_gap_aware` looks for NaN."""
    return _MissingValues(_NOT_FINITE)


def _gap_aware(always_fill=False):
    """Run the method on complete rows as it is (no extra pass over them); if a row has
    a missing feature, run it again with ``_gaps`` saying where. Both paths read the
    NaN and mend the rows' design themselves, block by block; with ``always_fill`` the
    method gets a copy filled at the centre."""
    def decorate(method):
        @wraps(method)
        def wrapper(self, X, *args, _gaps=None, **kwargs):
            if _gaps is not None:
                return method(self, X, *args, _gaps=_gaps, **kwargs)
            try:
                return method(self, X, *args, **kwargs)
            except _MissingValues:
                X = self._rows(X, check=False)
                gaps = missing.find(X, fused.kernels() if fused.enabled() else None)
                if gaps is None:        # nothing missing: only overflowing sums
                    raise ModelError(_NOT_FINITE) from None
                if always_fill:
                    X = missing.fill(X, self.center, gaps)
                return method(self, X, *args, _gaps=gaps, **kwargs)
        return wrapper
    return decorate


@dataclass(frozen=True)
class Scores:
    """What scoring says about each row.

    Attributes
    ----------
    log_density : ndarray of shape (n_samples,)
        ``log p(x)`` under the mixture, in the data's own units.
    resp : ndarray of shape (n_samples, n_components)
        Responsibilities.
    component : ndarray of shape (n_samples,)
        Index of the most responsible component.
    segment : ndarray of shape (n_samples,)
        Stable segment id of that component.
    confidence : ndarray of shape (n_samples,)
        The largest responsibility.
    """

    log_density: np.ndarray
    resp: np.ndarray
    component: np.ndarray
    segment: np.ndarray
    confidence: np.ndarray


@dataclass(frozen=True, eq=False)
class Mixture:
    """A Gaussian mixture held as sufficient statistics (immutable; updates return copies).

    Build one with :func:`shoal.core.initialise` or :meth:`from_parameters`; restore one
    with :meth:`from_state`.
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
                prec_chol, log_det = _factor_compiled(self.covariances)
            else:
                family = FAMILIES[self.covariance]
                prec_chol = family.precision_cholesky(self.covariances)
                log_det = family.log_det(prec_chol, self.n_features)
            object.__setattr__(self, "prec_chol", prec_chol)
            object.__setattr__(self, "log_det", log_det)

    # ------------------------------------------------------------------ shape
    @property
    def n_components(self) -> int:
        return int(self.s0.shape[0])

    @property
    def n_features(self) -> int:
        return int(self.center.shape[0])

    @property
    def family(self):
        return FAMILIES[self.covariance]

    @property
    def n_eff(self) -> float:
        """Kish's effective number of rows behind the statistics."""
        return 1.0 / self.sumsq

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

        ``covariances`` has shape (K, D, D), (K, D) or (K,) for full, diag and
        spherical. A spherical mixture needs equal ``scale`` in every feature.
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

    # ---------------------------------------------------------- validation
    def _rows(self, X, check: bool = True) -> np.ndarray:
        """``X`` as float64 rows of the right width; with ``check``, also finite.

        The compiled path passes ``check=False``: its design kernel checks every value it
        reads and :meth:`_fused_span` raises the same error.
        """
        X = np.asarray(X, dtype=np.float64)
        if X.ndim != 2 or X.shape[1] != self.n_features:
            raise ModelError(
                f"X should have shape (n_samples, {self.n_features}), got {X.shape}"
            )
        # a finite sum means finite rows (one pass, no temporary); if the sum is not
        # finite, look row by row (a sum of huge finite values can overflow)
        if check and not np.isfinite(np.sum(X)) and not np.all(np.isfinite(X)):
            raise _not_finite(X)
        return X

    def standardise(self, X) -> np.ndarray:
        """``(X - center) / scale`` for validated rows, shape (n_samples, n_features)."""
        return (self._rows(X) - self.center) / self.scale

    # --------------------------------------------------------------- scoring
    def _score_design(self, A, out, lo, operator):
        """Score the rows of design matrix ``A`` into the preallocated ``out`` at ``lo``."""
        hi = lo + A.shape[0]
        # (K, n) layout: every reduction over components runs along contiguous rows.
        resp = out.resp_kn[:, lo:hi]
        self.family.log_joint(A, operator, out=resp)
        self._normalise(resp, out, lo, hi)

    def _normalise(self, resp, out, lo, hi):
        """Log-joint ``resp`` (K, hi - lo) -> responsibilities in place; the other scores
        of rows ``lo:hi`` into ``out``."""
        top = np.max(resp, axis=0)
        resp -= top
        # The most responsible component now sits at exactly 0 (first one on ties).
        rank = (resp == 0.0) * self._rank_weights[:, None]
        out.component[lo:hi] = self.n_components - 1 - np.max(rank, axis=0)
        # Clamp at e^-230 (1e-100): as subnormal numbers, far smaller
        # responsibilities would slow every later GEMM a hundredfold.
        np.maximum(resp, -230.0, out=resp)
        np.exp(resp, out=resp)
        total = np.sum(resp, axis=0)
        resp /= total
        out.log_density[lo:hi] = np.log(total) + top - self._log_scale_sum
        np.divide(1.0, total, out=out.confidence[lo:hi])

    def _score_block(self, Zb, out, lo):
        """Score a block of standardised rows into ``out`` at ``lo``; return its design."""
        A = self.family.design(Zb)
        self._score_design(A, out, lo, self._scoring_operator)
        return A

    def _score_span(self, X, lo, hi, out, operator, rows=None):
        """Score rows ``lo:hi`` of ``X`` block by block; return their design matrix.

        ``rows`` standardises data-unit rows (a :class:`_Standardiser`); without it
        ``X`` holds standardised rows already.
        """
        family = self.family
        A = np.empty((hi - lo, family.width(self.n_features)))
        for a in range(lo, hi, BLOCK_ROWS):
            b = min(a + BLOCK_ROWS, hi)
            Zb = X[a:b] if rows is None else rows(X[a:b])
            Ab = family.design(Zb, out=A[a - lo : b - lo])
            self._score_design(Ab, out, a, operator)
        return A

    def _fused_span(self, X, lo, hi, out, data_units=True, row_w=None, floor=0.0, gaps=None):
        """Score rows ``lo:hi`` with the compiled kernels; with ``row_w`` also learn.

        ``X`` holds rows in the data's own units (standardised here with the
        mixture's centre and scale) or, with ``data_units=False``, standardised rows.
        Returns the statistics ``(s0, s1, s2)`` of the span weighted by
        ``resp * row_w`` (responsibilities under ``floor`` count as zero), or None
        when ``row_w`` is None. Same results as :meth:`_score_span` and
        :meth:`_accumulate` up to rounding. ``gaps`` (:class:`missing.Packed`) lists the
        rows filled at the centre: they are scored by their marginals and learned from by
        EM with missing data.
        """
        kern = fused.kernels()
        family = self.family
        K, D = self.n_components, self.n_features
        W = family.width(D)
        learn = row_w is not None
        if learn:
            row_w = _c64(row_w)
        if hi <= lo:
            return (np.zeros_like(self.s0), np.zeros_like(self.s1),
                    np.zeros_like(self.s2)) if learn else None
        full = self.covariance == "full"
        nb = min(FUSED_ROWS if full else LINEAR_ROWS, hi - lo)
        A = np.empty((nb, W))
        R = out.resp_kn
        tiled = fused.tiled()
        if not tiled:
            top, total = np.empty(nb), np.empty(nb)
        if full:
            WT, const = self._scoring_operator
            const = const[:, 0].copy()
            if tiled:
                packed = self._packed_operator
            else:
                Y = np.empty((K * D, nb))
            if learn:
                P = np.zeros((K, W, W))
                if not tiled:
                    G = np.empty((K, nb, W))
                    counts = np.empty(K, dtype=np.intp)
        else:
            BT = self._scoring_operator
            if learn:
                P = np.zeros((K, W))
        lss = self._log_scale_sum
        kind = _DESIGN_KIND[self.covariance]
        if data_units:
            center, scale = _c64(self.center), _c64(self.scale)
        else:
            center, scale = np.zeros(D), np.ones(D)
        first = 0           # row of X that row `lo` of the span is
        if gaps is not None:
            gaps = missing.Bound(gaps, self, data_units, kern)
        if not X.flags.c_contiguous:
            X, first = np.ascontiguousarray(X[lo:hi]), lo
        for a in range(lo, hi, nb):
            b = min(a + nb, hi)
            m = b - a
            if not kern.design(X, a - first, m, center, scale, kind, A) and gaps is None:
                raise _not_finite(X)
            Ab = A[:m]
            if gaps is not None:
                gaps.fix(Ab, a)     # the rows' NaN (the only non-finite values) to zero
            if tiled:
                kern.log_joint(Ab, packed if full else BT, const if full else None, D, R, a)
            elif full:
                Yb = Y if m == nb else np.empty((K * D, m))
                np.matmul(WT, Ab.T, out=Yb)
                kern.full_log_joint(Yb, const, D, R, a)
            else:
                np.matmul(BT, Ab.T, out=R[:, a:b])
            if gaps is not None:
                gaps.log_joint(Ab, a, R)
            if tiled:
                kern.softmax(R, a, m, lss, out.component, out.log_density, out.confidence)
            else:
                kern.shift(R, a, m, top, out.component)
                Rb = R[:, a:b]
                np.exp(Rb, out=Rb)
                kern.normalise(R, a, m, total)
                ld = out.log_density[a:b]
                np.log(total[:m], out=ld)
                ld += top[:m]
                ld -= lss
                np.divide(1.0, total[:m], out=out.confidence[a:b])
            if learn:
                wb = row_w[a - lo : b - lo]
                if full and tiled:
                    kern.gather_syrk(Ab, R, a, wb, floor, P)
                elif full:
                    kern.gather_rows(Ab, R, a, wb, floor, G, counts)
                    for k in range(K):
                        c = counts[k]
                        if c:
                            Gk = G[k, :c]
                            P[k] += Gk.T @ Gk     # numpy runs A^T A as one SYRK
                else:
                    kern.accumulate_rows(Ab, R, a, wb, floor, P)
                if gaps is not None:
                    gaps.moments(Ab, a, R, wb, floor, P)
        return family.split_moments(P, D) if learn else None

    @property
    def _rank_weights(self):
        return np.arange(self.n_components - 1, -1, -1, dtype=np.int16)

    @cached_property
    def _scoring_operator(self):
        """Parameters packed for scoring (computed once per parameter set)."""
        if self.covariance == "full" and fused.enabled():
            K, D = self.means.shape
            WT = np.empty((K * D, D + 1))
            fused.kernels().full_operator(_c64(self.means), _c64(self.prec_chol),
                                          _c64(self.log_det), WT)
            const = np.log(self.weights) + self.log_det - 0.5 * D * LOG_2PI
            return WT, const[:, None]
        if fused.enabled():
            K, D = self.means.shape
            BT = np.empty((K, self.family.width(D)))
            log_const = np.log(self.weights) + self.log_det - 0.5 * D * LOG_2PI
            kern = fused.kernels()
            build = kern.diag_operator if self.covariance == "diag" else kern.spherical_operator
            build(_c64(self.means), _c64(self.prec_chol**2), _c64(log_const), BT)
            return BT
        return self.family.scoring_operator(self.means, self.prec_chol, np.log(self.weights))

    @cached_property
    def _packed_operator(self):
        """The full type's whitening operator packed for the tiled log-joint kernel."""
        WT = _c64(self._scoring_operator[0])
        packed = np.empty(fused.packed_full_len(*self.means.shape))
        fused.kernels().pack_full(WT, packed)
        return packed

    @property
    def _log_scale_sum(self):
        return float(np.sum(np.log(self.scale)))

    @_gap_aware()
    def score(self, X, *, _gaps=None) -> Scores:
        """Score rows without learning from them.

        Rows are scored in blocks of a few thousand, so memory beyond the outputs does
        not grow with ``len(X)``.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
            Rows in the data's own units; NaN marks a missing feature (the row is
            scored by the marginal over its observed features).
        """
        X = self._rows(X, check=not fused.enabled() and _gaps is None)
        out = ScoreBuffer(X.shape[0], self.n_components)
        if fused.enabled():
            packed = None if _gaps is None else missing.pack(_gaps, self.covariance,
                                                              self.n_components)
            self._fused_span(X, 0, X.shape[0], out, gaps=packed)
        else:
            if _gaps is not None:
                self._score_gaps(X, _gaps, out)
                return out.scores(self.ids)
            operator = self._scoring_operator
            rows = _Standardiser(self.center, self.scale)
            for lo in range(0, X.shape[0], SPAN_ROWS):
                self._score_span(X, lo, min(lo + SPAN_ROWS, X.shape[0]), out, operator, rows)
        return out.scores(self.ids)

    def _score_z(self, Z, moments_weight=None):
        """Score standardised rows.

        With ``moments_weight`` (a float), also return the moments of the rows with
        that weight each, i.e. the batch E-step's statistics.
        """
        n = Z.shape[0]
        out = ScoreBuffer(n, self.n_components)
        if fused.enabled():
            if moments_weight is None:
                self._fused_span(Z, 0, n, out, data_units=False)
                return out
            return out, self._fused_span(Z, 0, n, out, data_units=False,
                                         row_w=np.full(n, moments_weight))
        operator = self._scoring_operator
        total = None
        for lo in range(0, n, SPAN_ROWS):
            hi = min(lo + SPAN_ROWS, n)
            A = self._score_span(Z, lo, hi, out, operator)
            if moments_weight is not None:
                part = self.family.moments(A, out.resp_kn[:, lo:hi] * moments_weight)
                total = part if total is None else tuple(a + b for a, b in zip(total, part))
        if moments_weight is None:
            return out
        return out, total

    def log_density(self, X) -> np.ndarray:
        """``log p(x)`` per row, shape (n_samples,), in the data's own units."""
        return self.score(X).log_density

    def component_log_density(self, X) -> np.ndarray:
        """``log N(x | mu_k, Sigma_k)`` in data units, shape (n_samples, n_components)."""
        A = self.family.design(self.standardise(X))
        operator = self.family.scoring_operator(
            self.means, self.prec_chol, np.zeros(self.n_components)
        )
        return self.family.log_joint(A, operator).T - self._log_scale_sum

    # -------------------------------------------------------------- learning
    def _accumulate(self, A, resp_kn, row_w):
        """Weighted statistics ``(s0, s1, s2)`` of a block with design matrix ``A``.

        ``resp_kn`` has shape (n_components, n_samples), ``row_w`` (n_samples,).
        Responsibilities below ``resp_floor`` count as zero.
        """
        return self.family.weighted_moments(A, resp_kn, row_w, self.resp_floor)

    def _derive(self, s0, s1, s2, sumsq) -> dict:
        """Parameters from statistics (standardised units)."""
        if fused.enabled():
            return self._derive_compiled(s0, s1, s2, sumsq)
        s0_safe = s0 + _TINY
        cov = self.family.covariance(
            s0_safe, s1, s2, 1.0 / sumsq, self.reg_covar, self.prior_weight
        )
        weights = s0_safe / s0_safe.sum()
        prec_chol = self.family.precision_cholesky(cov)
        return dict(
            weights=weights,
            means=s1 / s0_safe[:, None],
            covariances=cov,
            prec_chol=prec_chol,
            log_det=self.family.log_det(prec_chol, self.n_features),
        )

    def _derive_compiled(self, s0, s1, s2, sumsq) -> dict:
        """:meth:`_derive` by the compiled kernels (a full-type refresh costs ~0.9 ms
        through numpy and LAPACK at K=8, D=16, a quarter of the E+M time; a diag one
        ~0.2 ms, mostly numpy's overhead on small arrays)."""
        K, D = s1.shape
        weights, means = np.empty(K), np.empty((K, D))
        if self.covariance != "full":
            var = np.empty((K, D) if self.covariance == "diag" else K)   # K from the statistics
            kern = fused.kernels()
            derive = kern.diag_derive if self.covariance == "diag" else kern.spherical_derive
            if not derive(_c64(s0), _c64(s1), _c64(s2), 1.0 / sumsq,
                          float(self.reg_covar), float(self.prior_weight), _TINY,
                          weights, means, var):
                raise non_positive_variance()
            prec_chol = 1.0 / np.sqrt(var)
            return dict(weights=weights, means=means, covariances=var, prec_chol=prec_chol,
                        log_det=self.family.log_det(prec_chol, D))
        cov, prec_chol = np.empty((K, D, D)), np.zeros((K, D, D))
        log_det, bad = np.empty(K), np.zeros(K, dtype=np.bool_)
        fused.kernels().full_derive(
            _c64(s0), _c64(s1), _c64(s2), 1.0 / sumsq, float(self.reg_covar),
            float(self.prior_weight), _TINY, weights, means, cov, prec_chol, log_det, bad)
        if bad.any():
            raise not_positive_definite(np.flatnonzero(bad).tolist())
        return dict(weights=weights, means=means, covariances=cov, prec_chol=prec_chol,
                    log_det=log_det)

    def _evolve(self, **changes) -> "Mixture":
        """``dataclasses.replace`` without re-running ``__init__`` (a tenth of the cost,
        which matters at every refresh). The scoring operators are dropped when the
        parameters change and kept otherwise."""
        new = object.__new__(type(self))
        state = dict(self.__dict__)
        if _PARAMETERS.intersection(changes):
            state.pop("_scoring_operator", None)
            state.pop("_packed_operator", None)
        state.update(changes)
        new.__dict__.update(state)
        return new

    def _refresh(self, s0, s1, s2, sumsq) -> dict:
        """New parameters at a refresh point, with Polyak-Ruppert averaging if enabled.

        With averaging, the running mean of the statistics taken at every refresh point
        since warm-up gives the parameters (Cappé & Moulines 2009, section 3: averaging
        the iterates of a slowly decreasing step recovers the efficiency of the
        maximum-likelihood estimate); the stepwise recursion itself goes on unchanged.
        """
        if not self.averaging:
            return self._derive(s0, s1, s2, sumsq)
        count = self.avg_count + 1
        share = 1.0 / count
        avg0 = self.avg_s0 + share * (s0 - self.avg_s0)
        avg1 = self.avg_s1 + share * (s1 - self.avg_s1)
        avg2 = self.avg_s2 + share * (s2 - self.avg_s2)
        out = self._derive(avg0, avg1, avg2, sumsq)
        out.update(avg_s0=avg0, avg_s1=avg1, avg_s2=avg2, avg_count=count)
        return out

    @_gap_aware()
    def learn(self, X, *, _gaps=None) -> tuple["Mixture", Scores]:
        """Score rows, then learn from them with stepwise EM.

        Rows are taken in order. Each row is scored with the parameters in force at
        its position in the stream (they refresh every ``refresh_rows`` learned rows)
        and enters the statistics with the weight the step schedule gives it.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
            NaN marks a missing feature: the row is scored by the marginal over its
            observed features and learned from by EM with missing data.

        Returns
        -------
        mixture : Mixture
            The updated mixture (``self`` is unchanged).
        scores : Scores
            The scores of every row, as labelled during learning.
        """
        jit = fused.enabled()
        X = self._rows(X, check=not jit and _gaps is None)
        n = X.shape[0]
        out = ScoreBuffer(n, self.n_components)
        rows = None if jit else _Standardiser(self.center, self.scale)
        model = self  # the parameters in force; replaced at refresh points only
        s0, s1, s2, sumsq = self.s0, self.s1, self.s2, self.sumsq
        at = self.n_rows
        pos = 0
        # rows with gaps: in the compiled kernels on that path, else by core/missing.py
        packed = None if _gaps is None or not jit else missing.pack(
            _gaps, self.covariance, self.n_components)
        gap_rows = None if jit else _gaps
        while pos < n:
            # pieces end at refresh points, which sit at fixed places in the stream;
            # they are scored in cache-sized blocks, then learned from in one go
            take = min(n - pos, self.refresh_rows - at % self.refresh_rows)
            row_w, keep = self.schedule.row_weights(at, take)
            if jit:
                b0, b1, b2 = model._fused_span(X, pos, pos + take, out, True, row_w,
                                               self.resp_floor, packed)
            elif gap_rows is not None:
                b0, b1, b2 = model._learn_span_gaps(X, pos, pos + take, gap_rows, row_w, out,
                                                    rows)
            else:
                A = model._score_span(X, pos, pos + take, out, model._scoring_operator, rows)
                b0, b1, b2 = model._accumulate(A, out.resp_kn[:, pos : pos + take], row_w)
            s0 = keep * s0 + b0
            s1 = keep * s1 + b1
            s2 = keep * s2 + b2
            sumsq = keep * keep * sumsq + float(np.dot(row_w, row_w))
            pos += take
            at += take
            if at % self.refresh_rows == 0:
                model = model._evolve(**model._refresh(s0, s1, s2, sumsq))
        model = model._evolve(s0=s0, s1=s1, s2=s2, sumsq=sumsq, n_rows=at)
        return model, out.scores(self.ids)

    @_gap_aware(always_fill=True)
    def em_step(self, X, *, _gaps=None) -> tuple["Mixture", float]:
        """One full-batch EM iteration (step size 1) on ``X``.

        Returns the mixture whose statistics are the batch averages and whose
        parameters are derived from them, and the mean log-density per row of ``X``
        under the parameters *before* the step (data units). NaN marks a missing
        feature (EM with missing data).
        """
        Z = self.standardise(X)
        if _gaps is not None:
            return self._em_step_gaps(Z, _gaps)
        return self._em_step(Z)

    def _em_step(self, Z):
        n = Z.shape[0]
        # Batch EM stays exact: the sparse floor is for the stepwise path only.
        out, (s0, s1, s2) = self._score_z(Z, moments_weight=1.0 / n)
        scores = out.scores(self.ids)
        sumsq = 1.0 / n
        params = self._derive(s0, s1, s2, sumsq)
        new = replace(self, s0=s0, s1=s1, s2=s2, sumsq=sumsq, **params)
        return new, float(np.mean(scores.log_density))

    # ---------------------------------------------- rows with missing features
    def _gap_block(self, X, gaps, out, lo, learn):
        """Score the rows ``lo + gaps.rows`` of the filled data-unit rows ``X`` by their
        marginals, into ``out``; with ``learn``, also return their E-step pieces."""
        rows = lo + gaps.rows
        Zf = (X[rows] - self.center) / self.scale
        L, aux = missing.gap_log_joint(self, Zf, gaps.mask, learn)
        sub = ScoreBuffer(rows.size, self.n_components)
        sub.resp_kn[:] = L
        self._normalise(sub.resp_kn, sub, 0, rows.size)
        out.put(rows, sub)
        return sub.resp_kn, aux

    def _score_span_gaps(self, X, lo, hi, part, out, rows, learn):
        """:meth:`_score_span` for a span whose rows ``lo + part.rows`` were filled at the
        centre: every row through the ordinary log-joint, the filled ones corrected to
        their marginals before the responsibilities are taken. Returns the span's design
        matrix and, with ``learn``, the E-step pieces of the filled rows."""
        family = self.family
        operator = self._scoring_operator
        A = np.empty((hi - lo, family.width(self.n_features)))
        for a in range(lo, hi, BLOCK_ROWS):
            b = min(a + BLOCK_ROWS, hi)
            Zb = X[a:b] if rows is None else rows(X[a:b])
            if rows is not None:
                Zb[np.isnan(Zb)] = 0.0      # the missing values at the centre
            Ab = family.design(Zb, out=A[a - lo : b - lo])
            family.log_joint(Ab, operator, out=out.resp_kn[:, a:b])
        at = lo + part.rows
        if rows is None:
            Zf = X[at]
        else:
            Zf = (X[at] - self.center) / self.scale
            Zf[part.mask] = 0.0
        corr, aux = missing.gap_correction(self, Zf, part.mask, learn)
        out.resp_kn[:, at] += corr
        for a in range(lo, hi, BLOCK_ROWS):
            b = min(a + BLOCK_ROWS, hi)
            self._normalise(out.resp_kn[:, a:b], out, a, b)
        return A, aux

    def _score_gaps(self, X, gaps, out):
        """Score the filled rows ``X`` whose rows ``gaps.rows`` have gaps, into ``out``."""
        rows = _Standardiser(self.center, self.scale)
        for lo in range(0, X.shape[0], SPAN_ROWS):
            hi = min(lo + SPAN_ROWS, X.shape[0])
            self._score_span_gaps(X, lo, hi, gaps.within(lo, hi), out, rows, learn=False)

    def _learn_span_gaps(self, X, lo, hi, gaps, row_w, out, rows):
        """The numpy path's statistics of rows ``lo:hi`` of the filled rows ``X`` (weights
        ``row_w``), scores into ``out``: every row's moments through the ordinary kernels,
        then what completing the filled rows adds (EM with missing data)."""
        part = gaps.within(lo, hi)
        if not len(part):
            A = self._score_span(X, lo, hi, out, self._scoring_operator, rows)
            return self._accumulate(A, out.resp_kn[:, lo:hi], row_w)
        A, aux = self._score_span_gaps(X, lo, hi, part, out, rows, learn=True)
        s0, s1, s2 = self._accumulate(A, out.resp_kn[:, lo:hi], row_w)
        resp = out.resp_kn[:, lo + part.rows]
        W = resp * row_w[part.rows]
        if self.resp_floor > 0.0:
            W[resp < self.resp_floor] = 0.0
        c1, c2 = missing.completion_moments(self, W, aux)
        return s0, s1 + c1, s2 + c2

    def _em_step_gaps(self, Z, gaps):
        """:meth:`_em_step` on standardised rows with gaps (filled at zero): the complete
        rows through the ordinary batch E-step, the others by EM with missing data."""
        n = Z.shape[0]
        complete = np.ones(n, dtype=bool)
        complete[gaps.rows] = False
        log_density = np.empty(n)
        if complete.any():
            out, stats = self._score_z(np.ascontiguousarray(Z[complete]), moments_weight=1.0 / n)
            log_density[complete] = out.log_density
        else:
            stats = (np.zeros_like(self.s0), np.zeros_like(self.s1), np.zeros_like(self.s2))
        out = ScoreBuffer(n, self.n_components)
        # in standardised units: the gap kernels add back log-scale terms of the missing
        # features that standardised rows do not carry
        unit = self._evolve(center=np.zeros_like(self.center), scale=np.ones_like(self.scale))
        for a in range(0, len(gaps), missing.BLOCK_ROWS):
            part = Gaps(gaps.rows[a : a + missing.BLOCK_ROWS],
                        gaps.mask[a : a + missing.BLOCK_ROWS])
            resp, aux = unit._gap_block(Z, part, out, 0, learn=True)
            stats = tuple(x + y for x, y in zip(stats, missing.gap_moments(self, resp / n, aux)))
        log_density[gaps.rows] = (out.log_density[gaps.rows] - self._log_scale_sum
                                  + gaps.mask @ np.log(self.scale))
        s0, s1, s2 = stats
        params = self._derive(s0, s1, s2, 1.0 / n)
        new = replace(self, s0=s0, s1=s1, s2=s2, sumsq=1.0 / n, **params)
        return new, float(np.mean(log_density))

    # ------------------------------------------------------------- reporting
    def data_means(self) -> np.ndarray:
        """Component means in data units, shape (n_components, n_features)."""
        return self.center + self.means * self.scale

    def data_covariance_matrices(self) -> np.ndarray:
        """Full covariance matrices in data units, shape (n_components, D, D)."""
        mats = self.family.matrices(self.covariances, self.n_features)
        return mats * np.outer(self.scale, self.scale)

    def data_covariances(self) -> np.ndarray:
        """Covariances in data units: (K, D, D) for full, else per-feature variances (K, D)."""
        if self.covariance == "full":
            return self.data_covariance_matrices()
        var = self.covariances if self.covariance == "diag" else self.covariances[:, None]
        return var * self.scale**2

    def data_stds(self) -> np.ndarray:
        """Per-feature standard deviations of each component, data units, shape (K, D)."""
        mats = self.data_covariance_matrices()
        return np.sqrt(np.diagonal(mats, axis1=1, axis2=2))

    def low_mass(self, min_weight: float | None = None) -> np.ndarray:
        """Stable ids of components whose weight is below ``min_weight`` (default mass_floor)."""
        floor = self.mass_floor if min_weight is None else float(min_weight)
        return self.ids[self.weights < floor]

    def n_parameters(self) -> int:
        """Free parameters (for BIC)."""
        k, d = self.n_components, self.n_features
        return (k - 1) + k * d + self.family.n_parameters(k, d)

    # --------------------------------------------------------- serialisation
    _ARRAYS = ("center", "scale", "s0", "s1", "s2", "weights", "means", "covariances", "ids",
               "avg_s0", "avg_s1", "avg_s2")

    def to_state(self) -> tuple[dict, dict]:
        """A flat mapping of numeric arrays and a JSON-able metadata dict (no pickle)."""
        arrays = {name: np.array(getattr(self, name)) for name in self._ARRAYS}
        meta = {
            "format_version": FORMAT_VERSION,
            "covariance": self.covariance,
            "next_id": int(self.next_id),
            "n_rows": int(self.n_rows),
            "sumsq": float(self.sumsq),
            "schedule": self.schedule.to_dict(),
            "reg_covar": float(self.reg_covar),
            "prior_weight": float(self.prior_weight),
            "resp_floor": float(self.resp_floor),
            "refresh_rows": int(self.refresh_rows),
            "mass_floor": float(self.mass_floor),
            "averaging": bool(self.averaging),
            "avg_count": int(self.avg_count),
        }
        return arrays, meta

    @classmethod
    def from_state(cls, arrays: dict, meta: dict) -> "Mixture":
        """Rebuild a mixture saved by :meth:`to_state`; the round trip is exact."""
        version = meta.get("format_version")
        if version != FORMAT_VERSION:
            raise ModelError(
                f"model state has format_version {version!r}; this shoal reads {FORMAT_VERSION}"
            )
        missing = [name for name in cls._ARRAYS if name not in arrays]
        if missing:
            raise ModelError(f"model state lacks arrays {missing}")
        if meta.get("covariance") not in FAMILIES:
            raise ModelError(f"model state has unknown covariance {meta.get('covariance')!r}")
        data = {name: np.array(arrays[name]) for name in cls._ARRAYS}
        data["ids"] = data["ids"].astype(np.int64)
        return cls(
            covariance=meta["covariance"],
            next_id=int(meta["next_id"]),
            n_rows=int(meta["n_rows"]),
            sumsq=float(meta["sumsq"]),
            schedule=StepSchedule.from_dict(meta["schedule"]),
            reg_covar=float(meta["reg_covar"]),
            prior_weight=float(meta["prior_weight"]),
            resp_floor=float(meta["resp_floor"]),
            refresh_rows=int(meta["refresh_rows"]),
            mass_floor=float(meta["mass_floor"]),
            averaging=bool(meta["averaging"]),
            avg_count=int(meta["avg_count"]),
            **data,
        )


def _c64(a) -> np.ndarray:
    """``a`` as a C-contiguous float64 array (the compiled kernels take no other)."""
    return np.ascontiguousarray(a, dtype=np.float64)


def _factor_compiled(cov):
    """Precision Cholesky factors and their log-determinants by the compiled kernel."""
    cov = _c64(cov)
    K = cov.shape[0]
    prec_chol, log_det, bad = np.zeros_like(cov), np.empty(K), np.zeros(K, dtype=np.bool_)
    fused.kernels().full_factor(cov, prec_chol, log_det, bad)
    if bad.any():
        raise not_positive_definite(np.flatnonzero(bad).tolist())
    return prec_chol, log_det


class _Standardiser:
    """``(X - center) / scale`` for blocks of up to BLOCK_ROWS rows, into one reused buffer.

    On C-ordered rows the arithmetic runs over the flattened block against center and
    scale tiled to the block's length: one long vector loop instead of a short loop per
    row, with the same values as the broadcast expression. The result is a view of
    the buffer, valid until the next call.
    """

    __slots__ = ("center", "scale", "_center", "_scale", "_buffer")

    def __init__(self, center, scale):
        self.center, self.scale = center, scale
        self._center = np.tile(center, BLOCK_ROWS)
        self._scale = np.tile(scale, BLOCK_ROWS)
        self._buffer = np.empty(BLOCK_ROWS * center.shape[0])

    def __call__(self, X):
        size = X.size
        if size > self._buffer.size or not X.flags.c_contiguous:
            return (X - self.center) / self.scale
        z = self._buffer[:size]
        np.subtract(X.reshape(-1), self._center[:size], out=z)
        np.divide(z, self._scale[:size], out=z)
        return z.reshape(X.shape)


class ScoreBuffer:
    """Preallocated outputs that blocks of rows are scored into."""

    __slots__ = ("resp_kn", "log_density", "component", "confidence")

    def __init__(self, n_samples, n_components):
        self.resp_kn = np.empty((n_components, n_samples))
        self.log_density = np.empty(n_samples)
        self.component = np.empty(n_samples, dtype=np.intp)
        self.confidence = np.empty(n_samples)

    def put(self, rows, sub: "ScoreBuffer") -> None:
        """The scores of ``sub`` into ``rows``."""
        self.resp_kn[:, rows] = sub.resp_kn
        self.log_density[rows] = sub.log_density
        self.component[rows] = sub.component
        self.confidence[rows] = sub.confidence

    def scores(self, ids) -> Scores:
        return Scores(
            log_density=self.log_density,
            resp=self.resp_kn.T,
            component=self.component,
            segment=ids[self.component],
            confidence=self.confidence,
        )
