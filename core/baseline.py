"""The drift baseline: what each segment looked like when the model was last accepted.

A :class:`Baseline` keeps, per stable segment id, the weight, mean and covariance
matrix in the data's own units and how many effective rows stood behind them, plus
the mean log-density per row of the data around the snapshot; it travels in the
checkpoint as a plain dict (:meth:`Baseline.to_dict`).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Mapping

import numpy as np

from .errors import ModelError
from .lifecycle import segment_index
from .mixture import Mixture

__all__ = ["Baseline", "WHOLE_MODEL", "baseline_from_sums"]

WHOLE_MODEL = "all"
"""The segment key of statistics about the whole model (``fit_drop``)."""

STATE_FORMAT = 1


# --------------------------------------------------------------------------- baseline


@dataclass(frozen=True, eq=False)
class Baseline:
    """What each segment looked like when the model was last accepted as normal.

    Attributes
    ----------
    ids : ndarray of int64, shape (n_segments,)
    weights : ndarray of shape (n_segments,)
    means : ndarray of shape (n_segments, n_features)
        Data units.
    covariances : ndarray of shape (n_segments, n_features, n_features)
        Full matrices in data units, whatever the model's covariance type.
    n_eff : ndarray of shape (n_segments,)
        Effective rows behind each segment's mean and covariance (``inf``: exact).
    total_n_eff : float
        Effective rows behind the weights.
    log_density : float
        Mean log-density per row of the data around the snapshot (nats; ``nan``
        when not known).
    covariance : str
        Covariance type of the model (sets the spread-change noise).
    """

    ids: np.ndarray
    weights: np.ndarray
    means: np.ndarray
    covariances: np.ndarray
    n_eff: np.ndarray
    total_n_eff: float
    log_density: float = math.nan
    covariance: str = "full"

    @property
    def n_features(self) -> int:
        """Number of features of the means and covariances."""
        return int(self.means.shape[1])

    @classmethod
    def from_mixture(cls, mixture: Mixture, log_density=None) -> "Baseline":
        """Snapshot every segment of ``mixture``.

        Parameters
        ----------
        mixture : Mixture
        log_density : float, optional
            Mean log-density per row of recent data under ``mixture`` (data units).

        Returns
        -------
        Baseline
            Each segment's ``n_eff`` is ``weight * mixture.n_eff``.
        """
        return cls(
            ids=np.array(mixture.ids, dtype=np.int64),
            weights=np.array(mixture.weights, dtype=np.float64),
            means=mixture.data_means(),
            covariances=mixture.data_covariance_matrices(),
            n_eff=mixture.weights * mixture.n_eff,
            total_n_eff=float(mixture.n_eff),
            log_density=math.nan if log_density is None else float(log_density),
            covariance=mixture.covariance,
        )

    def index_of(self, segment_id) -> int:
        """Position of a segment id in the baseline.

        Parameters
        ----------
        segment_id : int

        Returns
        -------
        int
            Its row in the arrays; :class:`ModelError` if the baseline has it not once.
        """
        return segment_index(self.ids, segment_id, "the baseline")

    def adopt(self, mixture: Mixture, ids) -> "Baseline":
        """A copy in which the given segments take their present state as baseline.

        For a segment born after the snapshot, once it has settled. Other segments
        keep their baseline; ``total_n_eff`` and ``log_density`` are unchanged.

        Parameters
        ----------
        mixture : Mixture
        ids : sequence of int
            Segments of ``mixture``.

        Returns
        -------
        Baseline
        """
        fresh = Baseline.from_mixture(mixture)
        keep = self.without(ids)
        take = np.array([fresh.index_of(i) for i in ids], dtype=np.int64)
        return replace(
            keep,
            ids=np.concatenate([keep.ids, fresh.ids[take]]),
            weights=np.concatenate([keep.weights, fresh.weights[take]]),
            means=np.concatenate([keep.means, fresh.means[take]]),
            covariances=np.concatenate([keep.covariances, fresh.covariances[take]]),
            n_eff=np.concatenate([keep.n_eff, fresh.n_eff[take]]),
        )

    def without(self, ids) -> "Baseline":
        """A copy without the given segments (for example retired ones).

        Parameters
        ----------
        ids : iterable of int

        Returns
        -------
        Baseline
        """
        keep = ~np.isin(self.ids, np.asarray(list(ids), dtype=np.int64))
        return replace(
            self, ids=self.ids[keep], weights=self.weights[keep], means=self.means[keep],
            covariances=self.covariances[keep], n_eff=self.n_eff[keep],
        )

    def to_dict(self) -> dict:
        """The baseline as plain lists and numbers, for the checkpoint's JSON.

        Returns
        -------
        dict
            With ``format``; ``inf`` and ``nan`` stored as ``None``.
        """

        def num(x):
            return float(x) if math.isfinite(x) else None

        return {
            "format": STATE_FORMAT,
            "ids": [int(i) for i in self.ids],
            "weights": self.weights.tolist(),
            "means": self.means.tolist(),
            "covariances": self.covariances.tolist(),
            "n_eff": [num(n) for n in self.n_eff],
            "total_n_eff": num(self.total_n_eff),
            "log_density": num(self.log_density),
            "covariance": self.covariance,
        }

    @classmethod
    def from_dict(cls, data: Mapping) -> "Baseline":
        """Rebuild a baseline saved by :meth:`to_dict`.

        Parameters
        ----------
        data : mapping

        Returns
        -------
        Baseline
            :class:`ModelError` on another format or a missing field.
        """
        if data.get("format") != STATE_FORMAT:
            raise ModelError(
                f"baseline has format {data.get('format')!r}; this shoal reads {STATE_FORMAT}"
            )
        missing = [k for k in ("ids", "weights", "means", "covariances", "n_eff",
                               "total_n_eff", "log_density", "covariance") if k not in data]
        if missing:
            raise ModelError(f"baseline lacks {missing}")
        n_features = len(data["means"][0]) if data["means"] else 0
        return cls(
            ids=np.array(data["ids"], dtype=np.int64),
            weights=np.array(data["weights"], dtype=np.float64),
            means=np.array(data["means"], dtype=np.float64).reshape(-1, n_features),
            covariances=np.array(data["covariances"], dtype=np.float64).reshape(
                -1, n_features, n_features
            ),
            n_eff=np.array([math.inf if n is None else n for n in data["n_eff"]], np.float64),
            total_n_eff=math.inf if data["total_n_eff"] is None else float(data["total_n_eff"]),
            log_density=math.nan if data["log_density"] is None else float(data["log_density"]),
            covariance=str(data["covariance"]),
        )




def baseline_from_sums(mixture: Mixture, sums, n_rows: int, log_density_sum: float,
                       center) -> Baseline:
    """A baseline from the rows themselves rather than from the model.

    After a re-baseline the model lags a population that has just moved by about a
    half-life; the windows' own sums give the present. A segment with too few rows
    for a covariance (Kish's effective rows ``T^2 / Q <= D + 1``), or whose window
    covariance is not positive definite, keeps the model's mean and covariance.

    Parameters
    ----------
    mixture : Mixture
        The model (ids, covariance type, and the fallback per segment).
    sums : WindowSums
        The windows' sums, rows in the order of ``mixture.ids``.
    n_rows : int
        Rows behind the sums.
    log_density_sum : float
        Sum of the rows' log-densities.
    center : ndarray of shape (n_features,)
        The centre the sums' rows were taken from.

    Returns
    -------
    Baseline
        Weights ``T / n_rows``; means ``center + M / B``; covariances
        ``S / B - (M / B)(M / B)^T`` (``B`` the sums' ``mass``, :class:`WindowSums`)
        projected to the covariance type; ``total_n_eff``
        ``n_rows`` and ``log_density`` the mean per row.
    """
    model = Baseline.from_mixture(mixture)
    d = mixture.n_features
    T, Q = sums.T, sums.Q
    weights, means = T / n_rows, model.means.copy()
    covs, n_eff = model.covariances.copy(), model.n_eff.copy()
    with np.errstate(divide="ignore", invalid="ignore"):
        kish = np.where(Q > 0, T * T / np.where(Q > 0, Q, 1.0), 0.0)
    mass = sums.mass
    for k in np.flatnonzero((Q > 0) & (kish > d + 1) & (mass > 0)).tolist():
        dev = sums.M[k] / mass[k]
        cov = sums.S[k] / mass[k] - np.outer(dev, dev)
        if mixture.covariance == "diag":
            cov = np.diag(np.diag(cov))
        elif mixture.covariance == "spherical":
            cov = np.eye(d) * np.diag(cov).mean()
        if np.all(np.linalg.eigvalsh(cov) > 0):
            means[k], covs[k] = center + dev, cov
            n_eff[k] = T[k] * T[k] / Q[k]
    return Baseline(ids=model.ids, weights=weights, means=means, covariances=covs,
                    n_eff=n_eff, total_n_eff=float(n_rows), log_density=log_density_sum / n_rows,
                    covariance=mixture.covariance)
