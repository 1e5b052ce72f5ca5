"""Sequential change detectors: the two-sided tabular CUSUM and Page-Hinkley.

Both come as a pure function over an array of observations (state in, state out)
and a small detector class whose state is plain Python numbers, so the service can
store it with a model checkpoint (``to_dict`` / ``from_dict``) and carry it from one
input to the next.

Tabular CUSUM (Page 1954; Montgomery, *Introduction to Statistical Quality
Control*, "The tabular CUSUM"), on standardised observations ``z``::

    C+_i = max(0, C+_{i-1} + z_i - k)      (upward moves)
    C-_i = max(0, C-_{i-1} - z_i - k)      (downward moves)

It signals at observation ``i`` when ``C+_i > h`` or ``C-_i > h``. ``k`` (the
reference value, usually half the shift to detect, in standard deviations) and
``h`` (the decision interval) set the average run length; with ``k = 0.5`` and
``h = 4`` or ``5`` the two-sided scheme averages about 168 or 465 observations
between false alarms and detects a one-standard-deviation shift after about 8.4 or
10.4 observations.

Page-Hinkley, for a drop in the level of a series ``x`` (for example the mean
log-density per row of each input)::

    m_t = sum_{i <= t} (x_i - level_i + delta)      M_t = max(0, m_1, ..., m_t)

It signals when ``M_t - m_t > threshold``. ``level_i`` is a fixed reference level
when one is given (then the test is a one-sided CUSUM in the data's units), or else
the running mean of ``x_1 .. x_i`` (the usual form for a stream whose level is not
known in advance). ``delta`` is the size of drop tolerated without signalling.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, fields
from typing import NamedTuple

import numpy as np

from .errors import ModelError

__all__ = [
    "Cusum",
    "CusumPath",
    "CusumResult",
    "PageHinkley",
    "PageHinkleyResult",
    "cusum_path",
    "cusum_update",
    "page_hinkley_update",
]


class CusumPath(NamedTuple):
    """Every step of a CUSUM over one or many independent series.

    Attributes
    ----------
    upper, lower : ndarray, the shape of ``z``
        ``C+`` and ``C-`` after each observation, before any reset.
    signal : ndarray of int8, the shape of ``z``
        ``+1`` where ``C+ > h``, ``-1`` where ``C- > h``, else ``0``.
    final_upper, final_lower : ndarray of shape ``z.shape[1:]``
        The state to carry into the next call (after any reset).
    """

    upper: np.ndarray
    lower: np.ndarray
    signal: np.ndarray
    final_upper: np.ndarray
    final_lower: np.ndarray


class CusumResult(NamedTuple):
    """Alarms of a CUSUM over one series, and the state to carry forward.

    Attributes
    ----------
    alarms : ndarray of int64, shape (n_alarms,)
        Indices (into the observations of this call) at which the CUSUM signalled.
    directions : ndarray of int8, shape (n_alarms,)
        ``+1`` for an upward move, ``-1`` for a downward one.
    upper, lower : float
        ``C+`` and ``C-`` after the last observation.
    """

    alarms: np.ndarray
    directions: np.ndarray
    upper: float
    lower: float


class PageHinkleyResult(NamedTuple):
    """Alarms of a Page-Hinkley test over one series, and the state to carry forward.

    Attributes
    ----------
    alarms : ndarray of int64, shape (n_alarms,)
        Indices (into the observations of this call) at which the test signalled.
    statistic : ndarray of shape (n_steps,)
        ``M_t - m_t`` after each observation, before any reset.
    n_seen, mean, cumulative, cumulative_max : int, float, float, float
        The state after the last observation.
    """

    alarms: np.ndarray
    statistic: np.ndarray
    n_seen: int
    mean: float
    cumulative: float
    cumulative_max: float


def _check_positive(name, value, allow_zero):
    value = float(value)
    if not np.isfinite(value) or value < 0 or (value == 0 and not allow_zero):
        bound = "non-negative" if allow_zero else "positive"
        raise ModelError(f"{name} should be a finite {bound} number, got {value!r}")
    return value


def _check_series(values, name, one_dimensional):
    values = np.asarray(values, dtype=np.float64)
    if one_dimensional and values.ndim != 1:
        raise ModelError(f"{name} should have shape (n_steps,), got {values.shape}")
    if not one_dimensional and values.ndim < 1:
        raise ModelError(f"{name} should have shape (n_steps, ...), got a scalar")
    if not np.all(np.isfinite(values)):
        raise ModelError(f"{name} should be finite; drop or impute NaN and infinity first")
    return values


class _PlainState:
    """A detector whose whole state is its dataclass fields: plain numbers, JSON-able."""

    def to_dict(self):
        """The detector as a JSON-able dict of plain numbers."""
        return asdict(self)

    @classmethod
    def from_dict(cls, state):
        """Rebuild a detector from :meth:`to_dict` output."""
        return _detector_from_dict(cls, state)


def _detector_from_dict(cls, state):
    """Rebuild a detector dataclass from its ``to_dict`` mapping, checking the keys."""
    names = [field.name for field in fields(cls)]
    missing = sorted(set(names) - set(state))
    if missing:
        raise ModelError(f"{cls.__name__} state is missing {missing}; got keys {sorted(state)}")
    return cls(**{name: state[name] for name in names})


def _cusum_path(z, k, h, upper, lower, reset):
    upper_path = np.empty(z.shape)
    lower_path = np.empty(z.shape)
    signal = np.zeros(z.shape, dtype=np.int8)
    upper = np.array(upper, dtype=np.float64, copy=True)
    lower = np.array(lower, dtype=np.float64, copy=True)
    for i in range(z.shape[0]):
        upper = np.maximum(0.0, upper + z[i] - k)
        lower = np.maximum(0.0, lower - z[i] - k)
        upper_path[i] = upper
        lower_path[i] = lower
        up, down = upper > h, lower > h
        signal[i] = np.where(up, 1, np.where(down, -1, 0))
        if reset:
            fired = up | down
            upper = np.where(fired, 0.0, upper)
            lower = np.where(fired, 0.0, lower)
    return CusumPath(upper_path, lower_path, signal, upper, lower)


def cusum_path(z, k=0.5, h=5.0, upper=0.0, lower=0.0, reset=True):
    """Run the two-sided tabular CUSUM over one or many independent series.

    Parameters
    ----------
    z : array_like of shape (n_steps,) or (n_steps, n_series)
        Standardised observations (subtract the in-control mean, divide by its
        standard deviation); axis 0 is time.
    k : float, default 0.5
        Reference value (allowance), in standard deviations.
    h : float, default 5.0
        Decision interval, in standard deviations.
    upper, lower : float or array_like of shape ``z.shape[1:]``, default 0.0
        ``C+`` and ``C-`` before the first observation.
    reset : bool, default True
        Restart both sums at zero after a signal (as after a corrective action). With
        ``False`` the sums keep running and every step above ``h`` signals.

    Returns
    -------
    CusumPath
    """
    z = _check_series(z, "z", one_dimensional=False)
    k = _check_positive("k", k, allow_zero=True)
    h = _check_positive("h", h, allow_zero=False)
    upper = np.broadcast_to(np.asarray(upper, dtype=np.float64), z.shape[1:])
    lower = np.broadcast_to(np.asarray(lower, dtype=np.float64), z.shape[1:])
    if np.any(upper < 0) or np.any(lower < 0):
        raise ModelError("upper and lower should be non-negative (CUSUM sums never go below 0)")
    return _cusum_path(z, k, h, upper, lower, bool(reset))


def cusum_update(z, k=0.5, h=5.0, upper=0.0, lower=0.0, reset=True):
    """Run the two-sided tabular CUSUM over one series and return its alarms.

    Parameters
    ----------
    z : array_like of shape (n_steps,)
        Standardised observations, oldest first.
    k, h, reset : see :func:`cusum_path`.
    upper, lower : float, default 0.0
        The state carried from the previous call.

    Returns
    -------
    CusumResult
    """
    z = _check_series(z, "z", one_dimensional=True)
    path = cusum_path(z, k, h, float(upper), float(lower), reset)
    alarms = np.flatnonzero(path.signal)
    return CusumResult(alarms, path.signal[alarms], float(path.final_upper), float(path.final_lower))


@dataclass
class Cusum(_PlainState):
    """A two-sided tabular CUSUM whose state is plain floats.

    Attributes
    ----------
    k, h : float
        Reference value and decision interval, in standard deviations.
    reset : bool
        Restart both sums after a signal.
    upper, lower : float
        Current ``C+`` and ``C-``.
    n_seen : int
        Observations taken so far.
    """

    k: float = 0.5
    h: float = 5.0
    reset: bool = True
    upper: float = 0.0
    lower: float = 0.0
    n_seen: int = 0

    def update(self, z):
        """Take standardised observations ``z`` of shape (n_steps,); return the alarms.

        Alarm indices count from the first observation of this call; add the
        ``n_seen`` read before the call for a position in the whole stream.
        """
        result = cusum_update(z, self.k, self.h, self.upper, self.lower, self.reset)
        self.upper, self.lower = result.upper, result.lower
        self.n_seen += int(np.size(z))
        return result



def page_hinkley_update(
    x,
    delta,
    threshold,
    level=None,
    n_seen=0,
    mean=0.0,
    cumulative=0.0,
    cumulative_max=0.0,
    reset=True,
):
    """Run a Page-Hinkley test for a drop in level over one series.

    Parameters
    ----------
    x : array_like of shape (n_steps,)
        Observations, oldest first, in the data's units.
    delta : float
        Drop tolerated without signalling, in the units of ``x``.
    threshold : float
        Signal when ``M_t - m_t`` exceeds it (often called lambda).
    level : float, optional
        Fixed reference level. ``None`` compares each observation with the running
        mean of the observations so far (since the last reset).
    n_seen, mean, cumulative, cumulative_max : int, float, float, float
        The state carried from the previous call: observations in the running mean,
        the running mean, ``m_t`` and ``M_t``.
    reset : bool, default True
        After a signal, restart ``m``, ``M`` and the running mean, so the test learns
        the new level and signals again only on a further drop.

    Returns
    -------
    PageHinkleyResult
    """
    x = _check_series(x, "x", one_dimensional=True)
    delta = _check_positive("delta", delta, allow_zero=True)
    threshold = _check_positive("threshold", threshold, allow_zero=False)
    fixed = None if level is None else float(level)
    n_seen, mean = int(n_seen), float(mean)
    cumulative, cumulative_max = float(cumulative), float(cumulative_max)
    statistic = np.empty(x.shape[0])
    alarms = []
    for i, value in enumerate(x.tolist()):
        n_seen += 1
        mean += (value - mean) / n_seen
        reference = mean if fixed is None else fixed
        cumulative += value - reference + delta
        cumulative_max = max(cumulative_max, cumulative)
        statistic[i] = cumulative_max - cumulative
        if statistic[i] > threshold:
            alarms.append(i)
            if reset:
                n_seen, mean, cumulative, cumulative_max = 0, 0.0, 0.0, 0.0
    return PageHinkleyResult(
        np.array(alarms, dtype=np.int64), statistic, n_seen, mean, cumulative, cumulative_max
    )


@dataclass
class PageHinkley(_PlainState):
    """A Page-Hinkley test for a drop in level, whose state is plain numbers.

    Attributes
    ----------
    delta, threshold : float
        Tolerated drop and decision threshold, in the units of the observations.
    level : float or None
        Fixed reference level, or ``None`` for the running mean.
    reset : bool
        Restart after a signal.
    n_seen, mean, cumulative, cumulative_max : int, float, float, float
        State: observations in the running mean, the running mean, ``m_t``, ``M_t``.
    """

    delta: float
    threshold: float
    level: float | None = None
    reset: bool = True
    n_seen: int = 0
    mean: float = 0.0
    cumulative: float = 0.0
    cumulative_max: float = 0.0

    def update(self, x):
        """Take observations ``x`` of shape (n_steps,); return the alarms (indices into ``x``)."""
        result = page_hinkley_update(
            x,
            self.delta,
            self.threshold,
            self.level,
            self.n_seen,
            self.mean,
            self.cumulative,
            self.cumulative_max,
            self.reset,
        )
        self.n_seen, self.mean = result.n_seen, result.mean
        self.cumulative, self.cumulative_max = result.cumulative, result.cumulative_max
        return result

