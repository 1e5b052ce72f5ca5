"""The per-row step-size schedule of stepwise EM.

Row ``i`` (counted from 1 after warm-up) moves the sufficient statistics by

    S <- (1 - eta_i) S + eta_i s(x_i)

(Cappé & Moulines 2009, eq. 7; Liang & Klein 2009). A batch of rows ``a+1 .. a+n`` is
applied as the product of its rows' steps: the batch keeps ``prod (1 - eta_j)`` of the
old statistics and gives row ``i`` the weight ``eta_i prod_{j>i} (1 - eta_j)``. The
weight a row ends up with therefore does not depend on how the stream was cut into
batches.

Two schedules, picked by ``half_life_rows``:

Converging (``half_life_rows`` None)
    ``eta_i = (i + i0) ** -alpha`` with ``alpha`` in (0.5, 1] (the Robbins-Monro
    conditions) and ``i0 = n_warmup ** (1 / alpha)``, so that the first row after
    warm-up weighs as much as one warm-up row. The steps go to zero and the model
    converges; the parameters are taken from the Polyak-Ruppert average of the
    iterates (Cappé & Moulines 2009, section 3).

Tracking (``half_life_rows = h``)
    ``eta_i = eta = 1 - 2 ** (-1 / h)`` for every row from the end of warm-up on.

Why the tracking step is constant from the first row. The weight of everything the
statistics held at row ``t`` (a segment's mass, the old part of its mean) is
multiplied by ``prod_{t<j<=t+n} (1 - eta_j)`` over the next ``n`` rows. It halves after
``h`` rows for *every* ``t`` exactly when ``sum_j -log(1 - eta_j) = log 2`` over every
stretch of ``h`` rows, i.e. when the step is the constant ``eta``; to first order a
stretch whose steps average ``c * eta`` has a half-life of ``h / c``. Schedules that
begin larger lose the memory they promise at the start of the stream:

* ``max(eta, (i + i0) ** -alpha)`` (``i0`` as above) reaches ``eta`` only at
  ``i ~ eta ** (-1 / alpha)``, 8.7 million rows for ``h`` = 50,000 and ``alpha`` 0.7;
  before that a segment that vanishes loses half its weight within 5,000-7,000 rows.
* ``max(eta, 1 / (n_warmup + i))``, the running mean of warm-up and later rows until
  its step falls to ``eta``, reaches the floor at ``n_warmup + i = 1 / eta ~ 1.44 h``.
  A segment that vanishes at row ``t`` before that keeps ``(n_warmup + t) /
  (n_warmup + t + n)`` of its weight, a half-life of ``n_warmup + t`` rows: 105,000
  rather than 200,000 for a vanishing at row 100,000 with ``h`` = 200,000.

The price of the constant step is paid by the warm-up: its fit enters with weight 1,
as if the population had always looked like the warm-up buffer, and it fades like any
other row (half of it is left after ``h`` rows) instead of being averaged away by the
first rows after it. Kish's effective rows ``1 / sum w_i^2`` start at ``n_warmup`` and
approach ``(2 - eta) / eta ~ 2.885 h``. Measured (``tests/test_core_schedule_memory.py``,
K=4, D=2, seeded): a component of weight 0.2 that vanishes at row 100,000 keeps half
its weight after 10,000 / 50,016 / 200,031 rows for ``h`` = 10,000 / 50,000 / 200,000,
and a 1-sd jump of its mean is half covered after 9,680 / 50,560 / 205,198 rows; at row
2,000,000 (the schedule's own row weights on a drawn responsibility stream) the same
figures are ``h`` and 0.998-1.003 ``h``. The earlier schedule gave 4,700 rows at row
100,000 whatever ``h``, and 19,100 at row 2,000,000 for ``h`` = 50,000 or 200,000.

A model saved under the earlier tracking schedule (``max(eta, (i + i0) ** -alpha)``)
has the same stored fields (``alpha``, ``i0``, ``half_life_rows``) and statistics that
are valid running averages, so it is carried on as it is: from the next row on its
steps are ``eta``. ``alpha`` and ``i0`` are kept (and still filled in) but only the
converging schedule uses them.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, replace

import numpy as np

from .errors import ModelError

__all__ = ["StepSchedule", "floor_from_half_life"]


def floor_from_half_life(half_life_rows: float) -> float:
    """The constant step whose geometric forgetting halves a row's weight in ``half_life_rows``.

    Parameters
    ----------
    half_life_rows : float
        Rows after which a row's weight is halved.

    Returns
    -------
    floor : float
        The step, with ``(1 - floor) ** half_life_rows == 0.5``.
    """
    return float(-np.expm1(np.log(0.5) / half_life_rows))


@dataclass(frozen=True)
class StepSchedule:
    """Step sizes: ``eta_i = (i + i0) ** -alpha`` without a half-life, else the constant
    ``1 - 2 ** (-1 / half_life_rows)`` (see the module docstring).

    Parameters
    ----------
    alpha : float in (0.5, 1]
        Decay exponent of the converging schedule. 1 gives the running average; values
        in (0.5, 1) satisfy the Robbins-Monro conditions and forget the start faster.
    i0 : float or None
        Offset of the row counter. ``None`` is resolved at warm-up to
        ``n_warmup ** (1 / alpha)``, so that the first row after warm-up carries the
        same weight as one warm-up row and early batches do not erase the warm-up fit.
    half_life_rows : float or None
        If set, the constant step that makes a row's weight halve after this many
        newer rows, from the first row after warm-up on, so that the model tracks a
        drifting population. ``None`` lets the steps shrink to zero, so the model
        converges.
    """

    alpha: float = 0.7
    i0: float | None = None
    half_life_rows: float | None = None

    def __post_init__(self):
        if not (0.5 < float(self.alpha) <= 1.0):
            raise ModelError(f"alpha should lie in (0.5, 1], got {self.alpha!r}")
        if self.i0 is not None and not (float(self.i0) >= 0.0):
            raise ModelError(f"i0 should be >= 0 or None, got {self.i0!r}")
        if self.half_life_rows is not None and not (float(self.half_life_rows) >= 1.0):
            raise ModelError(
                f"half_life_rows should be >= 1 or None, got {self.half_life_rows!r}"
            )

    @functools.cached_property
    def floor(self) -> float:
        """The tracking step (0 when the model converges); worked out once per schedule
        (the learning loop asks at every span)."""
        if self.half_life_rows is None:
            return 0.0
        return floor_from_half_life(float(self.half_life_rows))

    @functools.cached_property
    def _log_keep(self):
        """``log(1 - floor)``: the log of what a constant step keeps of a row per row."""
        return np.log1p(-self.floor)

    def resolved(self, n_warmup: int) -> "StepSchedule":
        """A copy with ``i0`` fixed from the warm-up size when it was left open.

        Parameters
        ----------
        n_warmup : int
            Rows the warm-up fit stands for.

        Returns
        -------
        schedule : StepSchedule
        """
        if self.i0 is not None:
            return self
        return replace(self, i0=float(max(n_warmup, 1)) ** (1.0 / self.alpha))

    def steps(self, start: int, n_rows: int) -> np.ndarray:
        """The steps of the stream's rows ``start+1 .. start+n_rows``.

        Parameters
        ----------
        start : int
            Rows learned before (after warm-up).
        n_rows : int

        Returns
        -------
        eta : ndarray of shape (n_rows,)
        """
        if self.half_life_rows is not None:
            return np.full(n_rows, self.floor)
        if self.i0 is None:
            raise ModelError("the schedule's i0 is not resolved; call resolved(n_warmup)")
        eta = np.arange(start + 1, start + n_rows + 1, dtype=np.float64)
        eta += self.i0
        np.log(eta, out=eta)             # (i + i0)^-alpha as exp(-alpha log(i + i0))
        eta *= -self.alpha
        return np.exp(eta, out=eta)

    def row_weights(self, start: int, n_rows: int) -> tuple[np.ndarray, float]:
        """Weights of a batch's rows in the statistics, and what the old statistics keep.

        Parameters
        ----------
        start : int
            Rows learned before the batch (after warm-up).
        n_rows : int
            Rows in the batch.

        Returns
        -------
        weights : ndarray of shape (n_rows,)
            ``eta_i * prod_{j>i} (1 - eta_j)`` over the batch.
        keep : float
            ``prod_j (1 - eta_j)``: the factor applied to the statistics before the batch.
        """
        if self.half_life_rows is not None:
            # the constant step in closed form: row i keeps (1 - eta)^(rows after it)
            log_keep = float(self._log_keep)
            weights = np.arange(n_rows - 1, -1, -1, dtype=np.float64)
            weights *= log_keep
            np.exp(weights, out=weights)
            weights *= self.floor
            return weights, float(np.exp(n_rows * log_keep))
        eta = self.steps(start, n_rows)
        keep_each = 1.0 - eta
        # after[i] = prod_{j>i} (1 - eta_j), multiplied up from the end of the batch
        weights = np.empty(n_rows)
        if n_rows:
            weights[-1] = 1.0
            np.cumprod(keep_each[:0:-1], out=weights[-2::-1])
        keep = float(weights[0] * keep_each[0]) if n_rows else 1.0
        weights *= eta
        return weights, keep

    def cell_unit(self, anchor: int, end: int) -> float:
        """``eta_{anchor+1} * prod_{l=anchor+1}^{end} (1 - eta_l)``.

        Dividing the weights :meth:`row_weights` gives the rows of a batch ending at row
        ``end`` by this leaves ``eta_i / (eta_{anchor+1} prod_{anchor<l<=i} (1 - eta_l))``
        for row ``i``: a weight that depends only on the row's place after ``anchor``
        (1 at ``anchor + 1``, slowly growing), whatever the batch.

        Parameters
        ----------
        anchor, end : int
            Rows learned before the first row counted, and up to the last.

        Returns
        -------
        float
        """
        n = end - anchor
        if self.half_life_rows is not None:
            return float(self.floor * np.exp(n * self._log_keep))
        eta = self.steps(anchor, n)
        return float(eta[0] * np.exp(np.sum(np.log1p(-eta))))

    def average_weights(self, start: int, n_rows: int) -> tuple[np.ndarray, float]:
        """Weights for adding up the batch's iterates ``S_1 .. S_n`` (Polyak-Ruppert averaging).

        With ``S_i = c_i S_0 + sum_{j<=i} eta_j prod_{j<l<=i} (1 - eta_l) s_j``, the sum of the
        iterates over the batch is ``(sum_i c_i) S_0 + sum_j v_j s_j``.

        Parameters
        ----------
        start, n_rows : int
            As for :meth:`row_weights`.

        Returns
        -------
        weights : ndarray of shape (n_rows,)
            ``v_j = eta_j sum_{i>=j} prod_{j<l<=i} (1 - eta_l)``.
        keep_sum : float
            ``sum_i c_i = sum_i prod_{l<=i} (1 - eta_l)``.
        """
        eta = self.steps(start, n_rows)
        L = np.cumsum(np.log1p(-eta))          # L_i = sum_{l<=i} log(1 - eta_l)
        low = L[-1]
        tail = np.cumsum(np.exp(L - low)[::-1])[::-1]   # sum_{i>=j} exp(L_i - low)
        weights = eta * np.exp(low - L) * tail
        keep_sum = float(np.sum(np.exp(L)))
        return weights, keep_sum

    def to_dict(self) -> dict:
        """The schedule as a JSON-able dict.

        Returns
        -------
        data : dict
            ``alpha``, ``i0`` and ``half_life_rows``.
        """
        return {"alpha": self.alpha, "i0": self.i0, "half_life_rows": self.half_life_rows}

    @classmethod
    def from_dict(cls, data: dict) -> "StepSchedule":
        """The schedule saved by :meth:`to_dict`.

        Parameters
        ----------
        data : dict

        Returns
        -------
        schedule : StepSchedule
        """
        return cls(alpha=data["alpha"], i0=data["i0"], half_life_rows=data["half_life_rows"])
