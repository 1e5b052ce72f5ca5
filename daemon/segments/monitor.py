"""Drift of each segment against its baseline, window by window, and the alerts it raises.

The pipeline hands every piece of rows it learns to an :class:`InputWatch` (one per
input). Rows are gathered into evaluation windows of ``drift.window_rows`` rows,
counted along the stream from the first row learned after warm-up, so the windows do
not depend on how the stream is cut into files. A window keeps additive sums only
(responsibility totals, their squares, first and second moments per segment, taken
from the M-step's own statistics (:mod:`shoal.core.piece_moments`), the log-density
sums and the unusual rows), so a window may span inputs; the sums travel in the
checkpoint's ``extra["drift"]``. Closed windows are evaluated together before the
state is committed or the baseline changes, in order, as if one at a time.

When ``drift.settle_rows`` rows have been learned after warm-up (rounded up to a
whole window) the model is taken as the baseline (:class:`shoal.core.drift.Baseline`)
together with the mean log-density of the last window. After that each window is
compared with it, per segment:

``mean_shift``     the window's responsibility-weighted mean, in baseline sds
                   (Mahalanobis distance under the baseline covariance);
``spread_ratio``   ``exp(|log|S_window| - log|S_ref|| / (2 D))``, the geometric mean of
                   the sd ratios either way (evaluated on its log);
``weight_change``  ``|share of the window's rows - baseline weight|``;
``feature_shift[f]`` one feature's window mean in baseline sds (only when bounded);
``fit_drop``       (whole model) baseline mean log-density per row minus the window's.

A segment whose share of the window is under a quarter of its baseline weight is
not measured for the shape statistics (mean, spread, feature): the rows it still takes
are mostly its neighbours' tails, and ``weight_change`` tells the story.

Each comes with its estimation noise at Kish's effective rows of the window and of
the baseline. The numbers are the core's, over arrays of all segments at once
(:mod:`shoal.core.window_statistics`, :mod:`shoal.core.drift_noise`);
:func:`shoal.core.drift.evaluate_bounds` turns them into raised and cleared events
(bound and noise, persistence, hysteresis). This module keeps the bookkeeping: the
window records and piece sums (:mod:`.window_sums`), the values keyed for the bounds
(:mod:`.window_values`), and the alert payloads (:mod:`.drift_alerts`).
"""
from __future__ import annotations

import functools
import logging

import numpy as np

from shoal.config import Settings
from shoal.core import Mixture
from shoal.core.distances import GaussianSet
from shoal.core.baseline import baseline_from_sums
from shoal.core.drift import Baseline, evaluate_bounds
from shoal.core.drift_noise import spread_variance
from shoal.core.piece_tallies import PieceTallies, piece_tallies
from shoal.core.window_statistics import WindowSums, stack_sums, window_statistics
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.segments.drift_alerts import (PAYLOAD_SCHEMA_VERSION, STATISTIC_UNITS, alert_id,
                                                drift_event_alert, drift_summary)
from shoal.daemon.segments.missing_drift import window_shares
from shoal.daemon.segments.own_state import own_copy
from shoal.daemon.segments.window_sums import (
    add_piece_sums, add_row_sums, add_unusual, aligned_sums, baseline_missing_shares,
    empty_piece_sums, empty_window, log_times_left_out, merge_window_sums, time_kind,
    time_range, widen, window_copy)
from shoal.daemon.segments.window_values import (SEGMENT_STATISTICS, SHAPE_MIN_SHARE, quiet_windows,
                                                 settings_bounds, window_fit, window_values)

__all__ = ["DriftMonitor", "InputWatch", "alert_id", "STATISTIC_UNITS", "SEGMENT_STATISTICS",
           "PAYLOAD_SCHEMA_VERSION"]

STATE_FORMAT = 1
WAITING_WINDOWS = 64   # closed windows evaluated together, at most
# ----------------------------------------------------------------------------- monitor


class DriftMonitor:
    """The drift settings of a running service: it starts an :class:`InputWatch` for each
    input (none when drift is off), gives the bound of every (segment, statistic) pair
    from ``drift.bounds`` and the per-segment and per-feature overrides (spread_ratio on
    its log scale, as it is evaluated), and says whether feature shifts are wanted."""

    def __init__(self, settings: Settings):
        self.settings = settings
        self.drift = settings.drift
        self.features = list(settings.features)
        self._bounds: dict[frozenset, dict] = {}   # by the baseline's segment ids
        self._worked = None   # (baseline record, what worked_out gives)

    def begin(self, state: dict | None, *, version: int, file: str, times=None,
              unusual_below: float | None = None) -> "InputWatch | None":
        if not self.drift.enabled:
            return None
        return InputWatch(self, state, version=version, file=file, times=times,
                          unusual_below=unusual_below)

    # bounds from settings: statistic -> bound, (segment, statistic) -> bound (log scale for
    # spread_ratio)
    def bounds(self, segment_ids) -> dict:
        """The bound of every statistic (keys ``statistic``) and of every overridden
        (segment, statistic) pair of ``segment_ids`` (read-only; kept per id set)."""
        key = frozenset(segment_ids)
        if key not in self._bounds:
            self._bounds[key] = settings_bounds(self.drift, self.features, key)
        return self._bounds[key]

    def worked_out(self, doc: dict):
        """A baseline record as a :class:`Baseline`, its factorised Gaussians and the
        variance of its segments' log generalised variances, worked out once per record:
        records are replaced whole, never changed, and the inputs that follow share the
        committed one."""
        if self._worked is None or self._worked[0] is not doc:
            ref = Baseline.from_dict(doc)
            self._worked = (doc, ref, GaussianSet(ref.means, ref.covariances),
                            np.atleast_1d(spread_variance(ref.n_eff, ref.n_features,
                                                          ref.covariance)))
        return self._worked[1:]

    def wants_feature_shift(self) -> bool:
        return self.drift.bounds.feature_shift is not None or any(
            o.feature_shift is not None for o in self.drift.overrides)


class InputWatch:
    """Drift evaluation for the rows of one input: it adds each learned piece to its
    window's sums, and at each window's end takes the baseline, collects a re-baseline
    or evaluates the window against the baseline, turning crossings into alerts. Its
    ``state`` (the checkpoint's ``extra["drift"]``) and ``alerts`` go to the commit
    with the model; segments born or gone reach the baseline through
    :meth:`adopt_segments` and :meth:`drop_segments`."""

    # the model's FeatureTransforms (set by the pipeline): explanations give a
    # transformed feature's medians in the data's units
    transforms = None

    def __init__(self, monitor: DriftMonitor, state: dict | None, *, version: int, file: str,
                 times=None, unusual_below=None):
        self.monitor = monitor
        self.drift = monitor.drift
        self.version = version
        self.file = file
        self.times = times
        self.unusual_below = unusual_below
        self._alerts: list[tuple[str, dict]] = []
        self.rebaselined = False
        self._times_dropped = 0   # rows whose times did not fit their window's kind
        self.times_unreadable = 0   # time values present that could not be read
        if state is not None and state.get("format") != STATE_FORMAT:
            raise ValueError(f"drift state has format {state.get('format')!r}")
        # the baseline is only ever replaced whole (taken, adopted into, dropped from)
        self._state = own_copy(state, shared=("baseline", "window"))
        if self._state is not None and "window" in self._state:
            self._state["window"] = window_copy(self._state["window"])
        self._last = None   # ((values, noise, detail) or what makes them, bounds) of the last
        # closed windows waiting to be evaluated together: (record, info, sums, recent)
        self._waiting: list[tuple] = []
        # the open window's per-segment sums of the pieces since the last flush, as arrays
        self._pending: dict | None = None
        self._id_keys: tuple[list | None, list[str]] = (None, [])   # ids and their keys

    @property
    def state(self) -> dict | None:
        """The drift state (JSON-able, committed with the model), window sums up to date
        and every closed window evaluated."""
        self._evaluate_waiting()
        self._flush()
        return self._state

    @state.setter
    def state(self, value: dict | None) -> None:
        self._evaluate_waiting()
        self._flush()
        self._state = value

    @property
    def alerts(self) -> list[tuple[str, dict]]:
        """``(key, payload)`` of the alerts raised and cleared so far (every closed
        window evaluated)."""
        self._evaluate_waiting()
        return self._alerts

    # -- setup -----------------------------------------------------------------------
    def start(self, stream_offset: int) -> None:
        """A new model: windows count from its first learned row (stream row ``stream_offset``)."""
        self.state = {"format": STATE_FORMAT, "offset": int(stream_offset),
                      "window_rows": int(self.drift.window_rows), "baseline": None,
                      "baseline_number": 0, "baseline_info": None, "window": None,
                      "bounds": None, "cool": {}, "recent": [], "open": {},
                      "last_ld": None, "rebase": None}

    def _ensure(self) -> dict:
        if self._state is None:  # a model made before drift watching: count from here
            self.start(self.monitor.settings.warmup_rows)
        return self._state

    # -- pieces ----------------------------------------------------------------------
    @property
    def window_rows(self) -> int:
        """Fixed for a model once its watching started (a reload does not move windows)."""
        st = self._ensure()
        return int(st.get("window_rows") or self.drift.window_rows)

    def rows_to_boundary(self, n_rows: int) -> int:
        """Rows the next piece may hold so that it does not cross a window boundary."""
        w = self.window_rows
        return w - n_rows % w

    @property
    def unusual_bound(self) -> float | None:
        """The log-density under which a piece's rows count as unusual in its window (the
        baseline's threshold; None before a baseline)."""
        return ((self._ensure().get("baseline_info") or {}).get("unusual_below"))

    def observe(self, mixture: Mixture, X: np.ndarray, scores, start: int,
                tallies: PieceTallies | None = None) -> None:
        """Add a learned piece (rows ``start..`` of the input's learned rows); ``mixture`` is
        the model after learning it, ``tallies`` the piece's tallies under
        :attr:`unusual_bound` (:func:`shoal.core.piece_tallies.piece_tallies`; None:
        tallied here)."""
        st = self._ensure()
        if tallies is None:
            tallies = piece_tallies(scores.log_density, scores.component, X, mixture.center,
                                    mixture.n_components, unusual_below=self.unusual_bound)
        w = self.window_rows
        end_row = int(mixture.n_rows)
        first_row = end_row - len(X)
        index = first_row // w
        win = st["window"]
        if win is None or win["index"] != index:
            self._flush()
            win = st["window"] = empty_window(index)
        times = None if self.times is None else self.times[start:start + len(X)]
        self._accumulate(win, mixture, X, scores, times, tallies)
        if end_row % w == 0:
            self._close(win, mixture, first_window_row=index * w)
            st["window"] = None

    def _accumulate(self, win, mixture, X, scores, times, tallies):
        n = len(X)
        if n == 0:
            return
        win["n"] += n
        win["ld"] += tallies.ld_sum
        win["ld2"] += tallies.ld2_sum
        ids = mixture.ids.tolist()
        sums = self._pending
        moments = scores.moments
        if sums is None or sums["window"] is not win or sums["ids"] != ids:
            self._flush()
            sums = self._pending = empty_piece_sums(win, ids, X.shape[1], moments)
        elif moments is not None:   # the M-step's own moments (shoal.core.piece_moments)
            for key in ("T", "Q", "B", "M", "S"):
                sums[key] += getattr(moments, key)
        if moments is None:   # rows with missing features, or a spherical model
            add_row_sums(sums, mixture, X, X - mixture.center, scores)
        if tallies.unusual:
            add_unusual(win["unusual"], self._keys(ids), tallies)
        if self.file not in win["files"]:
            win["files"].append(self.file)
        win["versions"] = widen(win["versions"], self.version, self.version)
        span = time_range(times)
        if span is not None:
            if win["time"][0] is None or time_kind(win["time"][0]) == time_kind(span[0]):
                win["time"] = widen(win["time"], *span)
            else:   # numbers after times or text, or the other way: not comparable
                win["times_dropped"] = win.get("times_dropped", 0) + len(X)
                self._times_dropped += len(X)
        win["center"] = mixture.center.tolist()

    def _keys(self, ids: list[int]) -> list[str]:
        """The segment ids as the window records key them (``str``), kept while the ids
        stay the same."""
        if ids != self._id_keys[0]:
            self._id_keys = (ids, [str(sid) for sid in ids])
        return self._id_keys[1]

    def _flush(self) -> None:
        """Add the pending per-segment sums to their window's JSON-able sums."""
        sums, self._pending = self._pending, None
        if sums is not None:
            add_piece_sums(sums["window"]["segments"], sums)

    def _window_sums(self, win, ids) -> WindowSums:
        """A closing window's sums as arrays in the order of ``ids``: those of earlier
        inputs (JSON lists) and the pending ones of this input added, without putting
        them into the state (a closed window is not kept): values as after
        :meth:`_flush`."""
        if self._pending is not None and self._pending["window"] is not win:
            self._flush()
        pending, self._pending = self._pending, None
        return aligned_sums(win["segments"], pending, ids, len(self.monitor.features))

    # -- windows ---------------------------------------------------------------------
    def _window_info(self, win, first_window_row) -> dict:
        off = self._state["offset"]
        return {"index": win["index"],
                "rows": [off + first_window_row, off + first_window_row + win["n"] - 1],
                "versions": win["versions"], "files": win["files"],
                "time": win["time"] if win["time"][0] is not None else None}

    def _close(self, win, mixture: Mixture, first_window_row: int) -> None:
        st = self._state
        if st.get("rebase") is not None or st["baseline"] is None:
            self._flush()    # sums kept for the re-baseline (or not needed)
        info = self._window_info(win, first_window_row)
        keep = max(self.drift.persist, self.drift.resolve_persist)
        st["recent"] = (st["recent"] + [info])[-keep:]
        st["last_ld"] = win["ld"] / win["n"] if win["n"] else None
        if st.get("rebase") is not None:
            self._collect(win, mixture, info)
            return
        if st["baseline"] is None:
            if first_window_row + win["n"] >= self.drift.settle_rows:
                self._take_baseline(mixture, st["last_ld"], info)
                st["baseline_info"]["missing_share"] = window_shares(win["segments"])
            return
        ids = self._baseline()[0].ids.tolist()
        self._waiting.append((win, info, self._window_sums(win, ids), st["recent"]))
        if len(self._waiting) >= WAITING_WINDOWS:   # memory stays bounded on long inputs
            self._evaluate_waiting()

    def _take_baseline(self, mixture: Mixture, log_density, info, ref=None) -> None:
        st = self.state
        if ref is None:
            ref = Baseline.from_mixture(mixture, log_density=log_density)
        st["baseline"] = ref.to_dict()
        st["baseline_info"] = {"number": st["baseline_number"], "model_version": self.version,
                                "row": info["rows"][1] + 1, "unusual_below": self.unusual_below,
                                "note": None}
        st["bounds"], st["cool"], st["open"] = None, {}, {}
        log_event("drift_baseline_taken", baseline=st["baseline_number"],
                  model_version=self.version, row=info["rows"][1] + 1,
                  segments=[int(i) for i in ref.ids])

    def rebaseline(self, mixture: Mixture, note: str) -> None:
        """Accept the present as normal: raised alerts clear now, and the next
        ``settle_rows`` rows (whole windows, at least one) become the new baseline.

        The baseline is taken from those rows themselves (responsibility-weighted
        weights, means and covariances), not from the model, which lags a population
        that has just moved by about a half-life.
        """
        self._evaluate_waiting()
        st = self._ensure()
        for key, alert in sorted(st["open"].items()):
            payload = dict(alert["payload"], status="cleared", value=None,
                           cleared_by="rebaseline", note=note)
            payload["model_version"] = {"first": alert["payload"]["model_version"]["first"],
                                        "last": self.version}
            self.emit(payload)
        if st["baseline"] is not None:
            st["baseline_number"] += 1
        st["baseline"], st["bounds"], st["cool"], st["open"] = None, None, {}, {}
        st["rebase"] = {"note": note, "requested_version": self.version, "sums": None}
        self.rebaselined = True
        log_event("drift_rebaseline_started", baseline=st["baseline_number"],
                  model_version=self.version, note=note,
                  rows=max(self.drift.settle_rows, self.window_rows))

    def _collect(self, win, mixture: Mixture, info) -> None:
        """Add a window to the re-baseline sums; take the baseline once there are enough."""
        st = self.state
        rebase = st["rebase"]
        sums = rebase["sums"] = merge_window_sums(rebase["sums"], win)
        if sums["n"] < max(self.drift.settle_rows, self.window_rows):
            return
        ref = baseline_from_sums(mixture, aligned_sums(sums["segments"], None, mixture.ids.tolist(),
                                                        mixture.n_features),
                                 sums["n"], sums["ld"], np.asarray(sums["center"]))
        st["rebase"] = None
        self._take_baseline(mixture, ref.log_density, info, ref=ref)
        st["baseline_info"]["note"] = rebase["note"]
        st["baseline_info"]["missing_share"] = window_shares(sums["segments"])

    def _evaluate_waiting(self) -> None:
        """Evaluate the closed windows waiting, in order, their statistics in one go
        (windows are evaluated together, at the end of an input or before the
        baseline changes: the same decisions as one at a time, at a fraction of the
        cost). A window with no statistic past its bound, while no bound state is
        part-way or raised, changes nothing and is not keyed for the bounds."""
        waiting, self._waiting = self._waiting, []
        if not waiting:
            return
        ref, factors, ref_spread = self._baseline()
        ids = ref.ids.tolist()
        features = self.monitor.features
        wants_features = self.monitor.wants_feature_shift()
        stats = window_statistics(
            ref, factors, [w[0]["n"] for w in waiting], stack_sums([w[2] for w in waiting]),
            [w[0]["center"] for w in waiting], min_share=SHAPE_MIN_SHARE,
            baseline_missing=baseline_missing_shares(
                (self._state.get("baseline_info") or {}).get("missing_share"), ids,
                len(features)),
            feature_shift=wants_features, ref_spread_variance=ref_spread)
        fits = [window_fit(ref, w[0]) for w in waiting]
        bounds = self.monitor.bounds(ids)
        quiet = quiet_windows(stats, fits, bounds, ids, features, feature_shift=wants_features,
                              noise_multiple=self.drift.noise_multiple)
        st, K = self._state, len(ids)
        if st["bounds"] is None:    # a fresh bound state, as the bounds' first call leaves
            st["bounds"], _ = evaluate_bounds({}, {}, {})
        for i, (win, info, _, recent) in enumerate(waiting):
            one = functools.partial(stats.rows, i * K, (i + 1) * K)
            for key in [key for key, until in st["cool"].items() if until < win["index"]]:
                del st["cool"][key]
            if quiet[i] and not st["bounds"]["entries"]:
                self._last = (functools.partial(self._keyed, win, ref, one, fits[i],
                                                dict(st["cool"])), bounds)
                continue
            values, noise, detail = self._keyed(win, ref, one, fits[i], st["cool"])
            d = self.drift
            st["bounds"], events = evaluate_bounds(
                values, noise, bounds, st["bounds"], noise_multiple=d.noise_multiple,
                persist=d.persist, resolve_fraction=d.resolve_fraction,
                resolve_persist=d.resolve_persist, at=win["index"])
            self._last = ((values, noise, detail), bounds)
            for e in events:
                drift_event_alert(self, e, detail, ref, info, recent)

    def _keyed(self, win, ref, stats, fit, cool):
        """One window's ``(values, noise, detail)`` (``stats()`` its statistics), cooling
        pairs at 0."""
        values, noise, detail = window_values(
            win, ref, stats(), fit, self.monitor.features,
            feature_shift=self.monitor.wants_feature_shift())
        if cool:
            for (seg, stat) in list(values):
                if f"{seg}|{stat}" in cool:
                    values[(seg, stat)] = 0.0
        return values, noise, detail

    def _baseline(self):
        """The baseline in force, its factorised Gaussians and the variance of its
        segments' log generalised variances (:meth:`DriftMonitor.worked_out`)."""
        return self.monitor.worked_out(self._state["baseline"])

    # -- events -> alerts ------------------------------------------------------------
    def emit(self, payload: dict) -> None:
        """Add an alert payload to this input's alerts."""
        self._alerts.append((f"{payload['id']}.{payload['status']}", payload))

    def log_alerts(self, model_version: int) -> None:
        """One log line per alert; called once they are committed."""
        log_times_left_out(self.file, self.drift.time_column, self.times_unreadable,
                           self._times_dropped)
        for _, payload in self.alerts:
            level = logging.WARNING if payload["status"] == "raised" else logging.INFO
            log_event(f"alert_{payload['status']}", level, id=payload["id"],
                      model_version=model_version, severity=payload.get("severity"),
                      segment=payload.get("segment"), statistic=payload.get("statistic"),
                      value=payload.get("value"), bound=payload.get("bound"),
                      summary=(payload.get("explanation") or {}).get("summary"))

    # -- segments that came or left (lifecycle) -------------------------------------
    def adopt_segments(self, mixture: Mixture, ids) -> list[int]:
        """Settled segments of ``ids`` present in ``mixture`` join the baseline, with their
        present state; returns those taken in (none without a baseline: a baseline
        taken later includes them)."""
        st = self.state
        present = [sid for sid in ids if sid in set(mixture.ids.tolist())]
        if st is None or st.get("baseline") is None or not present:
            return []
        st["baseline"] = Baseline.from_dict(st["baseline"]).adopt(mixture, present).to_dict()
        return present

    def drop_segments(self, ids, why: str) -> None:
        """Segments that left (retired, merged away, split): out of the baseline, their
        raised alerts cleared (``cleared_by`` ``why``), their part-way crossings
        forgotten."""
        st = self.state
        if st is None:
            return
        if st.get("baseline") is not None:
            st["baseline"] = Baseline.from_dict(st["baseline"]).without(ids).to_dict()
        gone = {str(int(i)) for i in ids}
        for key in sorted(st.get("open", {})):
            if key.split("|")[0] not in gone:
                continue
            alert = st["open"].pop(key)
            payload = dict(alert["payload"], status="cleared", value=None, cleared_by=why,
                           note=f"segment {key.split('|')[0]} {why}")
            payload["model_version"] = {"first": alert["payload"]["model_version"]["first"],
                                        "last": self.version}
            self._alerts.append((f"{payload['id']}.cleared", payload))
        if st.get("bounds"):
            for sid in gone:
                st["bounds"]["entries"].pop(sid, None)

    # -- outputs ---------------------------------------------------------------------
    def segment_drift(self) -> dict[str, dict]:
        """Per segment id (str): the last window's statistics, noise and bounds (built
        when asked, once per input, not at every window)."""
        self._evaluate_waiting()
        if self._last is None:
            return {}
        keyed, bounds = self._last
        return drift_summary(keyed() if callable(keyed) else keyed, bounds)
