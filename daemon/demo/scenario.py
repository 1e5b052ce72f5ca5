"""The demo scenario: a cold-storage warehouse's refrigeration units (invented data).

Eight refrigeration units (``UNITS``) each report once a minute:

==================  =====================================================
``supply_air_c``    air leaving the evaporator, degC
``return_air_c``    air coming back from the room, degC
``compressor_a``    compressor current, A
``fan_rpm``         evaporator fan speed, rpm
``door_open_s``     seconds the unit's door was open in that minute, 0..60
==================  =====================================================

Every unit runs the same six-hour cycle, offset by 45 minutes per unit so that
the fleet is never all in one state: 30 minutes of *defrost* (heaters on,
compressor off, fan stopped, air warming), 40 minutes of *pull-down* (compressor
at full current bringing the room back down from warm), then *holding* at
setpoint, broken by two *door traffic* episodes of 15-35 minutes (forklifts in
and out: door open most of the minute, return air warmer, compressor working
harder). Within a state, readings are Gaussian with the covariances below, except
that door time is right-skewed, as durations are: ``log(1 + door_open_s)`` is the
Gaussian one (about 1 s/min while holding, 30 in door traffic); fan speed cannot go
below 0 and door time must lie in 0..60 s: values past a limit are reflected back
inside it (so there are no piles of identical values).

Two changes can be injected for the drift demo:

* :class:`Drift`: from a given row on, one unit's compressor draws more current
  whenever it runs, rising linearly (a worn compressor);
* :class:`NewState`: from a given row on, a share of all rows come from a state the
  model has not seen, *ice build-up* on the evaporator coil (airflow restricted:
  fan slowed, supply air warmer, compressor current high).

and one outage: :class:`Dropout`, some units' probe for one feature stops reporting for
a stretch of rows (the reading is missing: NaN here, null in the drops).

Rows are numbered from 0 in the order minute by minute, unit by unit, and row
``r`` is always the same reading for the same seed, however the stream is cut:
``generate(n, seed, start_row=s)`` returns rows ``s .. s + n - 1`` of one endless
stream, so files cut from it in any sizes concatenate to the same data.

numpy only; the demo and the tests share this module.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = [
    "FEATURES",
    "FEATURE_UNITS",
    "NEW_STATE",
    "START_TIME",
    "STATES",
    "UNITS",
    "Drift",
    "Dropout",
    "NewState",
    "demo_changes",
    "demo_dropout",
    "describe_states",
    "drops",
    "generate",
]

FEATURES = ("supply_air_c", "return_air_c", "compressor_a", "fan_rpm", "door_open_s")
FEATURE_UNITS = {
    "supply_air_c": "degC",
    "return_air_c": "degC",
    "compressor_a": "A",
    "fan_rpm": "rpm",
    "door_open_s": "s/min",
}
STATES = ("pull_down", "holding", "defrost", "door_traffic")
NEW_STATE = "ice_build_up"
UNITS = tuple(f"RU-{i:02d}" for i in range(1, 9))
START_TIME = np.datetime64("2024-01-01T00:00:00.000", "ms")

# Physical limits: readings past them are reflected back inside.
_LIMITS = {
    "supply_air_c": (-math.inf, math.inf),
    "return_air_c": (-math.inf, math.inf),
    "compressor_a": (-math.inf, math.inf),
    "fan_rpm": (0.0, math.inf),
    "door_open_s": (0.0, math.log1p(60.0)),     # on its log(1 + s) scale
}
# Features whose state parameters are on the log(1 + x) scale.
_LOG1P = ("door_open_s",)

# Per state: Gaussian mean and standard deviation of each feature (FEATURES order;
# door time as log(1 + s): 0.69 is a median of 1 s/min, 3.43 of 30) and the
# correlations that are not zero.
_S, _R, _C, _F, _D = range(5)
_STATE_PARAMETERS = {
    "pull_down": (
        (-12.0, -7.0, 31.0, 1460.0, 0.92),
        (3.0, 3.0, 2.0, 15.0, 0.4),
        {(_S, _R): 0.85, (_R, _C): 0.4, (_S, _C): 0.3},
    ),
    "holding": (
        (-22.0, -19.0, 18.0, 1450.0, 0.69),
        (0.6, 0.7, 1.5, 15.0, 0.35),
        {(_S, _R): 0.6, (_S, _C): -0.3, (_R, _C): 0.3, (_R, _D): 0.2},
    ),
    "defrost": (
        (-6.0, -13.0, 1.2, 10.0, 0.41),
        (2.5, 2.0, 0.4, 6.0, 0.3),
        {(_S, _R): 0.7},
    ),
    "door_traffic": (
        (-18.5, -13.0, 24.0, 1440.0, 3.43),
        (1.2, 1.8, 2.0, 20.0, 0.3),
        {(_S, _R): 0.6, (_R, _D): 0.6, (_R, _C): 0.4, (_C, _D): 0.3},
    ),
    NEW_STATE: (
        (-16.0, -14.5, 27.0, 1150.0, 0.69),
        (1.5, 1.5, 2.0, 40.0, 0.35),
        {(_S, _R): 0.7, (_S, _C): 0.2},
    ),
}
_ALL_STATES = STATES + (NEW_STATE,)
_HOLDING, _DEFROST, _PULL_DOWN, _DOOR, _NEW = (
    _ALL_STATES.index(name) for name in ("holding", "defrost", "pull_down", "door_traffic", NEW_STATE)
)

# The operating cycle of every unit, in minutes.
_CYCLE_MIN = 360
_DEFROST_MIN = 30
_PULL_DOWN_MIN = 40
_UNIT_OFFSET_MIN = 45
_DOOR_EPISODES = 2
_DOOR_MIN_LEN, _DOOR_MAX_LEN = 15, 35

# Random numbers come in fixed blocks of rows, each block from its own seeded
# generator, so any range of rows can be produced without the rows before it.
_BLOCK_ROWS = 4096
_NOISE_STREAM, _SCHEDULE_STREAM = 0, 1


def _covariance(sd, correlations):
    corr = np.eye(len(sd))
    for (i, j), rho in correlations.items():
        corr[i, j] = corr[j, i] = rho
    sd = np.asarray(sd)
    return corr * np.outer(sd, sd)


_MEANS = np.array([_STATE_PARAMETERS[s][0] for s in _ALL_STATES])
_SDS = np.array([_STATE_PARAMETERS[s][1] for s in _ALL_STATES])
_CHOLS = np.linalg.cholesky(
    np.array([_covariance(_STATE_PARAMETERS[s][1], _STATE_PARAMETERS[s][2]) for s in _ALL_STATES])
)


@dataclass(frozen=True)
class Drift:
    """One unit's compressor current rising linearly from ``start_row`` on.

    The rise applies whenever the compressor runs (every state except defrost):
    ``amps_per_10k_rows * (row - start_row) / 10_000`` amperes, where rows count the
    whole fleet's stream (one eighth of them are this unit's).
    """

    unit: str
    start_row: int
    amps_per_10k_rows: float

    def __post_init__(self):
        if self.unit not in UNITS:
            raise ValueError(f"drift unit should be one of {UNITS}, got {self.unit!r}")
        if int(self.start_row) != self.start_row or self.start_row < 0:
            raise ValueError(f"drift start_row should be a row number >= 0, got {self.start_row!r}")
        if not math.isfinite(self.amps_per_10k_rows):
            raise ValueError(f"amps_per_10k_rows should be finite, got {self.amps_per_10k_rows!r}")


@dataclass(frozen=True)
class NewState:
    """Ice build-up appearing from ``start_row`` on in a ``share`` of all rows.

    Each row from ``start_row`` on is, independently with probability ``share``, an
    ice build-up reading (of whichever unit the row belongs to) instead of its
    scheduled state.
    """

    start_row: int
    share: float

    def __post_init__(self):
        if int(self.start_row) != self.start_row or self.start_row < 0:
            raise ValueError(
                f"new state start_row should be a row number >= 0, got {self.start_row!r}"
            )
        if not 0.0 < self.share <= 1.0:
            raise ValueError(f"new state share should lie in (0, 1], got {self.share!r}")


@dataclass(frozen=True)
class Dropout:
    """The ``feature`` probe of ``units`` reports nothing for rows ``start_row`` up to
    ``start_row + n_rows`` (those readings are NaN)."""

    feature: str
    units: tuple
    start_row: int
    n_rows: int

    def __post_init__(self):
        if self.feature not in FEATURES:
            raise ValueError(f"dropout feature should be one of {FEATURES}, got {self.feature!r}")
        bad = [u for u in self.units if u not in UNITS]
        if bad or not self.units:
            raise ValueError(f"dropout units should be some of {UNITS}, got {self.units!r}")
        _check_rows("dropout start_row", self.start_row)
        _check_rows("dropout n_rows", self.n_rows)


def _check_rows(name, value):
    if isinstance(value, bool) or int(value) != value or value < 0:
        raise ValueError(f"{name} should be an integer >= 0, got {value!r}")
    return int(value)


def _scheduled_states(rows, seed):
    """The state code each row's unit is in by the six-hour cycle, shape (n_rows,)."""
    n_units = len(UNITS)
    unit = rows % n_units
    position = rows // n_units + unit * _UNIT_OFFSET_MIN
    cycle, minute = np.divmod(position, _CYCLE_MIN)
    codes = np.full(rows.shape, _HOLDING, dtype=np.int64)
    codes[minute < _DEFROST_MIN + _PULL_DOWN_MIN] = _PULL_DOWN
    codes[minute < _DEFROST_MIN] = _DEFROST
    # Door-traffic episodes: drawn per cycle for all units from that cycle's generator.
    cycles, cycle_index = np.unique(cycle, return_inverse=True)
    starts = np.empty((cycles.size, n_units, _DOOR_EPISODES), dtype=np.int64)
    lengths = np.empty_like(starts)
    first_free = _DEFROST_MIN + _PULL_DOWN_MIN
    for i, c in enumerate(cycles.tolist()):
        rng = np.random.default_rng([seed, _SCHEDULE_STREAM, c])
        starts[i] = rng.integers(first_free, _CYCLE_MIN - _DOOR_MAX_LEN + 1, (n_units, _DOOR_EPISODES))
        lengths[i] = rng.integers(_DOOR_MIN_LEN, _DOOR_MAX_LEN + 1, (n_units, _DOOR_EPISODES))
    row_starts = starts[cycle_index, unit]
    row_ends = row_starts + lengths[cycle_index, unit]
    in_door = np.any((row_starts <= minute[:, None]) & (minute[:, None] < row_ends), axis=1)
    codes[in_door] = _DOOR
    return codes


def _noise(start_row, n_rows, seed):
    """Standard normals (n_rows, n_features) and uniforms (n_rows,) for the rows."""
    first, last = start_row // _BLOCK_ROWS, (start_row + n_rows - 1) // _BLOCK_ROWS
    normals, uniforms = [], []
    for block in range(first, last + 1):
        rng = np.random.default_rng([seed, _NOISE_STREAM, block])
        normals.append(rng.standard_normal((_BLOCK_ROWS, len(FEATURES))))
        uniforms.append(rng.random(_BLOCK_ROWS))
    offset = start_row - first * _BLOCK_ROWS
    return (
        np.concatenate(normals)[offset : offset + n_rows],
        np.concatenate(uniforms)[offset : offset + n_rows],
    )


def _reflect(values, low, high):
    """Reflect values past a limit back inside [low, high] (then clip, for safety)."""
    values = np.where(values < low, 2.0 * low - values, values)
    values = np.where(values > high, 2.0 * high - values, values)
    return np.clip(values, low, high)


def generate(n_rows, seed, start_row=0, drift=None, new_state=None, dropout=None):
    """Rows ``start_row .. start_row + n_rows - 1`` of the warehouse stream.

    Parameters
    ----------
    n_rows : int
        How many rows.
    seed : int
        Seed of the whole stream (non-negative).
    start_row : int, default 0
        Number of the first row in the endless stream.
    drift : Drift, optional
        A unit's compressor current rising from a given row on.
    new_state : NewState, optional
        Ice build-up appearing from a given row on.
    dropout : Dropout, optional
        Some units' probe for one feature silent for a stretch of rows (NaN).

    Returns
    -------
    columns : dict of str to ndarray of shape (n_rows,)
        ``unit_id`` (str, one of ``UNITS``), ``timestamp`` (datetime64[ms], one
        minute per fleet round from ``START_TIME``), each of ``FEATURES`` (float64),
        and ``state`` (str, the true state; for tests and the demo's comparison,
        not an input to the model).
    """
    n_rows = _check_rows("n_rows", n_rows)
    start_row = _check_rows("start_row", start_row)
    seed = _check_rows("seed", seed)
    rows = np.arange(start_row, start_row + n_rows, dtype=np.int64)
    n_units = len(UNITS)
    codes = _scheduled_states(rows, seed)
    values = np.empty((n_rows, len(FEATURES)))
    if n_rows:
        normals, uniforms = _noise(start_row, n_rows, seed)
        if new_state is not None:
            codes[(rows >= new_state.start_row) & (uniforms < new_state.share)] = _NEW
        for code in range(len(_ALL_STATES)):
            chosen = codes == code
            values[chosen] = _MEANS[code] + normals[chosen] @ _CHOLS[code].T
    if drift is not None:
        worn = (
            (rows % n_units == UNITS.index(drift.unit))
            & (rows >= drift.start_row)
            & (codes != _DEFROST)
        )
        values[worn, _C] += drift.amps_per_10k_rows * (rows[worn] - drift.start_row) / 10_000.0
    columns = {
        "unit_id": np.array(UNITS)[rows % n_units],
        "timestamp": START_TIME + (rows // n_units) * np.timedelta64(60_000, "ms"),
    }
    for j, name in enumerate(FEATURES):
        columns[name] = _reflect(values[:, j], *_LIMITS[name])
        if name in _LOG1P:
            columns[name] = np.expm1(columns[name])
    if dropout is not None:
        silent = ((rows >= dropout.start_row) & (rows < dropout.start_row + dropout.n_rows)
                  & np.isin(rows % n_units, [UNITS.index(u) for u in dropout.units]))
        columns[dropout.feature][silent] = np.nan
    columns["state"] = np.array(_ALL_STATES)[codes]
    return columns


def drops(n_files, rows_per_file, seed, drift=None, new_state=None, start_row=0,
          dropout=None):
    """Yield ``n_files`` consecutive pieces of the stream, as the demo's input drops.

    Parameters
    ----------
    n_files, rows_per_file : int
    seed : int
    drift, new_state, dropout : optional
        As in :func:`generate`; their rows count from the start of the stream.
    start_row : int, default 0
        Row at which the first file begins.

    Yields
    ------
    columns : dict of str to ndarray of shape (rows_per_file,)
        File ``i`` holds rows ``start_row + i * rows_per_file`` onwards; see
        :func:`generate` for the columns.
    """
    n_files = _check_rows("n_files", n_files)
    rows_per_file = _check_rows("rows_per_file", rows_per_file)
    for i in range(n_files):
        yield generate(rows_per_file, seed, start_row + i * rows_per_file, drift, new_state,
                       dropout)


def demo_changes(total_rows, unit="RU-03", rise_a=8.0, new_state_share=0.12):
    """A drift and a new state placed in a stream of ``total_rows`` rows for the demo.

    The drift starts at 40% of the stream and has raised ``unit``'s compressor current
    by ``rise_a`` amperes by the end; ice build-up appears at 70% in a
    ``new_state_share`` of rows.

    Returns
    -------
    drift : Drift
    new_state : NewState
    """
    total_rows = _check_rows("total_rows", total_rows)
    drift_start = int(0.4 * total_rows)
    rate = rise_a * 10_000.0 / max(total_rows - drift_start, 1)
    return (
        Drift(unit=unit, start_row=drift_start, amps_per_10k_rows=rate),
        NewState(start_row=int(0.7 * total_rows), share=new_state_share),
    )


def demo_dropout(total_rows, feature="fan_rpm", units=UNITS[:4]):
    """The demo's probe outage: ``feature`` of ``units`` (half the fleet) silent from
    25% to 35% of a stream of ``total_rows`` rows."""
    total_rows = _check_rows("total_rows", total_rows)
    return Dropout(feature=feature, units=tuple(units), start_row=int(0.25 * total_rows),
                   n_rows=int(0.10 * total_rows))


def _normal_cdf(x):
    return 0.5 * (1.0 + math.erf(x / math.sqrt(2.0)))


def _normal_pdf(x):
    return math.exp(-0.5 * x * x) / math.sqrt(2.0 * math.pi)


def _reflected_mean(mean, sd, low, high):
    """Mean of N(mean, sd^2) reflected once at each limit:
    ``mean + 2 E[(low - X)+] - 2 E[(X - high)+]``."""
    result = mean
    if math.isfinite(low):
        a = (low - mean) / sd
        result += 2.0 * sd * (a * _normal_cdf(a) + _normal_pdf(a))
    if math.isfinite(high):
        b = (mean - high) / sd
        result -= 2.0 * sd * (b * _normal_cdf(b) + _normal_pdf(b))
    return result


def _reflected_expm1_mean(mean, sd, low, high, points=200_001):
    """Mean of ``exp(Y) - 1`` for ``Y`` N(mean, sd^2) reflected once at each limit: the
    reflected density ``f(y) + f(2 low - y) + f(2 high - y)`` on [low, high],
    integrated by the trapezoid rule (the integrand is smooth; 200,001 points)."""
    y = np.linspace(low, high, points)

    def f(x):
        return np.exp(-0.5 * ((x - mean) / sd) ** 2) / (sd * math.sqrt(2.0 * math.pi))

    density = f(y) + f(2.0 * low - y) + f(2.0 * high - y)
    values = np.expm1(y) * density
    return float(np.sum((values[1:] + values[:-1]) * np.diff(y)) / 2.0)


def describe_states(include_new_state=True):
    """The true mean of each feature in each state, in the data's units.

    These are the expected values of the generated readings (after reflection at the
    physical limits), before any injected drift.

    Returns
    -------
    means : dict of state name to dict of feature name to float
        States in the order of ``STATES``, then ``NEW_STATE`` if asked for.
    """
    names = _ALL_STATES if include_new_state else STATES
    out = {}
    for name in names:
        code = _ALL_STATES.index(name)
        out[name] = {
            feature: (_reflected_expm1_mean if feature in _LOG1P else _reflected_mean)(
                float(_MEANS[code, j]), float(_SDS[code, j]), *_LIMITS[feature])
            for j, feature in enumerate(FEATURES)
        }
    return out
