"""Prometheus metrics for ``/metrics``, in their own ``CollectorRegistry``.

Counters come from the ledger, so they equal it exactly and survive restarts
(a counter that never resets is still a counter). :class:`LedgerCollector`
reads only the ledger rows added since its last scrape. Gauges for the model,
the segments and the alerts are read from the state at scrape time; the queue
depth and health come from the live service through callables.

Names follow the Prometheus conventions: ``shoal_`` prefix, base units
(seconds, rows), ``_total`` on counters; no file names as labels. The state is read
through :mod:`shoal.daemon.state.readout`; this module only shapes it into families.
"""
from __future__ import annotations

import json
import threading
import time
from typing import Callable

from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.core import (
    CounterMetricFamily,
    GaugeMetricFamily,
    HistogramMetricFamily,
)
from prometheus_client.registry import Collector

from shoal.daemon.state.readout import (
    StateReader,
    latest_history_version,
    ledger_rows_after,
    notification_counts,
    open_alerts,
    read_alerts,
    segment_rows_at,
    undelivered_count,
)
from shoal.daemon.files.quarantine import quarantine_summary
from shoal.daemon.state.compacted import compacted_notifications, compacted_totals

__all__ = ["LedgerCollector", "build_registry", "render_metrics", "PROCESSING_BUCKETS"]

# Seconds from taking an input to committing it.
PROCESSING_BUCKETS = (0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0,
                      120.0, 300.0, 900.0)
OUTCOMES = ("committed", "duplicate", "quarantined")


class LedgerCollector(Collector):
    """Ledger counters and model/segment/alert gauges, read through ``reader``.

    ``live`` returns extra numbers from the running service (``queue_depth``,
    ``worker_healthy``, ``not_read`` counts by reason); None outside a service.
    """

    def __init__(self, reader: StateReader, live: Callable[[], dict] | None = None,
                 lock: threading.Lock | None = None, wall: Callable[[], float] = time.time,
                 layout=None):
        self.reader = reader
        self.layout = layout
        self.live = live
        self.lock = lock or threading.Lock()
        self.wall = wall
        self._last_id = 0
        self._inputs = dict.fromkeys(OUTCOMES, 0)
        self._rows = dict.fromkeys(OUTCOMES, 0)
        self._rows_invalid = 0
        # Ledger rows removed by retention still count (their totals are kept apart).
        for outcome, t in compacted_totals(reader.db).items():
            self._inputs[outcome] = self._inputs.get(outcome, 0) + t["inputs"]
            self._rows[outcome] = self._rows.get(outcome, 0) + t["rows"]
            self._rows_invalid += t["rows_invalid"]
        self._buckets = [0] * (len(PROCESSING_BUCKETS) + 1)
        self._seconds_sum = 0.0
        self._last_commit = None

    def _follow_ledger(self) -> None:
        rows = ledger_rows_after(self.reader, self._last_id)
        for id_, outcome, n, bad, seen, finished in rows:
            self._last_id = id_
            self._inputs[outcome] = self._inputs.get(outcome, 0) + 1
            self._rows[outcome] = self._rows.get(outcome, 0) + (n or 0)
            self._rows_invalid += bad or 0
            seconds = max(0.0, (finished or 0.0) - (seen or 0.0))
            self._seconds_sum += seconds
            i = next((j for j, b in enumerate(PROCESSING_BUCKETS) if seconds <= b),
                     len(PROCESSING_BUCKETS))
            self._buckets[i] += 1
            if outcome == "committed":
                self._last_commit = max(self._last_commit or 0.0, finished or 0.0)

    def collect(self):
        with self.lock:
            self._follow_ledger()
            yield from self._ledger_families()
            yield from self._state_families()
        if self.live is not None:
            yield from self._live_families(self.live())

    def _ledger_families(self):
        inputs = CounterMetricFamily("shoal_inputs", "Inputs finished, by ledger outcome",
                                     labels=["outcome"])
        rows = CounterMetricFamily("shoal_rows", "Rows read from finished inputs, by outcome",
                                   labels=["outcome"])
        for outcome in sorted(self._inputs):
            inputs.add_metric([outcome], self._inputs[outcome])
            rows.add_metric([outcome], self._rows[outcome])
        yield inputs
        yield rows
        yield CounterMetricFamily("shoal_rows_invalid",
                                  "Rows without a segment (null, NaN or infinite feature)",
                                  value=self._rows_invalid)
        cumulative, buckets = 0, []
        for bound, n in zip((*map(str, PROCESSING_BUCKETS), "+Inf"), self._buckets):
            cumulative += n
            buckets.append((bound, cumulative))
        yield HistogramMetricFamily("shoal_input_processing_seconds",
                                    "Seconds from taking an input to committing it",
                                    buckets=buckets, sum_value=self._seconds_sum)
        if self._last_commit is not None:
            yield GaugeMetricFamily("shoal_last_commit_timestamp_seconds",
                                    "Unix time of the last committed input",
                                    value=self._last_commit)

    def _state_families(self):
        yield GaugeMetricFamily("shoal_model_version", "Model version (one per learned input)",
                                value=self.reader.model_version)
        latest = latest_history_version(self.reader)
        weight = GaugeMetricFamily("shoal_segment_weight", "Share of rows of each segment",
                                   labels=["segment"])
        drift = GaugeMetricFamily("shoal_segment_drift",
                                  "Drift statistics of each segment against its baseline",
                                  labels=["segment", "statistic"])
        if latest is not None:
            for segment, w, stats in segment_rows_at(self.reader, latest):
                weight.add_metric([str(segment)], w)
                for name, value in _numbers(stats):
                    drift.add_metric([str(segment), name], value)
        yield weight
        yield drift
        notes = CounterMetricFamily("shoal_alert_notifications",
                                    "Alert notifications by status and severity",
                                    labels=["status", "severity"])
        counts: dict[tuple[str, str], int] = {}
        for key, n in compacted_notifications(self.reader.db).items():  # removed by retention
            status, severity = key.split("/", 1)
            counts[(status, severity)] = n
        alerts = read_alerts(self.reader)
        for key, n in notification_counts(alerts).items():
            counts[key] = counts.get(key, 0) + n
        for key, n in sorted(counts.items()):
            notes.add_metric(list(key), n)
        yield notes
        raised = GaugeMetricFamily("shoal_alerts_active", "Alerts raised and not yet cleared",
                                   labels=["severity"])
        by_severity = {"major": 0, "critical": 0}     # a drift alert's severities
        for a in open_alerts(alerts):
            sev = str(a.get("severity"))
            by_severity[sev] = by_severity.get(sev, 0) + 1
        for sev, n in sorted(by_severity.items()):
            raised.add_metric([sev], n)
        yield raised
        pending = undelivered_count(self.reader)
        yield GaugeMetricFamily("shoal_alerts_undelivered", "Alerts in the outbox not yet "
                                "delivered to every sink", value=pending)
        if self.layout is not None:
            held = GaugeMetricFamily("shoal_quarantined_inputs",
                                     "Inputs in the quarantine folder now, by reason",
                                     labels=["reason"])
            for reason, n in sorted(quarantine_summary(self.layout)["by_reason"].items()):
                held.add_metric([reason], n)
            yield held

    def _live_families(self, live: dict):
        if "rows_skipped" in live:
            yield CounterMetricFamily("shoal_rows_skipped", "CSV rows skipped as bad rows "
                                      "(input.bad_rows: skip) since the service started",
                                      value=live["rows_skipped"])
        if "queue_depth" in live:
            yield GaugeMetricFamily("shoal_queue_depth", "Inputs found and not yet taken",
                                    value=live["queue_depth"])
        if "worker_healthy" in live:
            yield GaugeMetricFamily("shoal_worker_healthy",
                                    "1 when the worker is alive and making progress",
                                    value=1.0 if live["worker_healthy"] else 0.0)
        if "heartbeat_age_seconds" in live:
            yield GaugeMetricFamily("shoal_worker_heartbeat_age_seconds",
                                    "Seconds since the worker last made progress",
                                    value=live["heartbeat_age_seconds"])
        if "not_read" in live:
            skipped = CounterMetricFamily("shoal_inputs_not_read",
                                          "Inbox entries never read (refused or vanished) "
                                          "since this process started", labels=["reason"])
            for reason in ("refused", "vanished"):
                skipped.add_metric([reason], live["not_read"].get(reason, 0))
            yield skipped


def _numbers(stats) -> list[tuple[str, float]]:
    """(name, value) for the numeric drift statistics in a history row's JSON."""
    if not stats:
        return []
    data = json.loads(stats) if isinstance(stats, str) else stats
    out = []
    for name, value in sorted(data.items()):
        if isinstance(value, dict):  # {"value": ..., "bound": ...} shapes
            value = value.get("value")
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            out.append((str(name), float(value)))
    return out


def build_registry(reader: StateReader, live: Callable[[], dict] | None = None,
                   lock: threading.Lock | None = None, layout=None) -> CollectorRegistry:
    """A registry of its own (never the global one) holding shoal's collector.

    With ``layout``, also the inputs in quarantine by reason."""
    registry = CollectorRegistry(auto_describe=False)
    registry.register(LedgerCollector(reader, live, lock, layout=layout))
    return registry


def render_metrics(registry: CollectorRegistry) -> bytes:
    return generate_latest(registry)
