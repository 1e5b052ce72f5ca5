"""Lifecycle events: segment-history entries, alert payloads and log lines.

Each birth, retirement, merge and split becomes an event (kept in the segment history,
in the data's units) and an alert (``kind: lifecycle``, severity ``warning``) whose id
names the event and the segment: ids are never reused, so the pair names one cause.
"""
from __future__ import annotations

import hashlib
import json
import logging

from dataclasses import replace

import numpy as np

from shoal.daemon.model.transforming import feature_centres, history_units
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.segments.drift_alerts import PAYLOAD_SCHEMA_VERSION
from shoal.daemon.state.store import HistoryRow

__all__ = ["lifecycle_alert_id", "describe", "lifecycle_event", "history_with_events",
           "log_lifecycle_alerts"]


def lifecycle_alert_id(event: str, segment: int) -> str:
    """Ids are never reused, so an event and a segment id name one cause."""
    cause = json.dumps([event, int(segment)])
    return "segment-" + hashlib.sha256(cause.encode()).hexdigest()[:20]


def _fmt(x: float) -> str:
    return f"{x:.4g}"


def describe(features, transforms, mean, sd) -> str:
    """A segment's mean and spread per feature (a transformed feature: its median and
    central 68% interval in the data's units)."""
    t = transforms
    back = {} if t is None or t.identity else feature_centres(t, features, mean, sd)
    return ", ".join(
        f"{f} {_fmt(back[f]['median'])} [{_fmt(back[f]['interval'][0])}, "
        f"{_fmt(back[f]['interval'][1])}]" if f in back else f"{f} {_fmt(m)}±{_fmt(s)}"
        for f, m, s in zip(features, mean, sd))

def lifecycle_event(life, kind: str, sid: int, n: int, *, weight, mean, spread, summary,
                    **more) -> None:
    """Record an event of ``life`` (a LifeWatch) at learned row ``n``: its segment-history
    entry and its alert (``kind: lifecycle``)."""
    row = life.state["offset"] + n
    mean, spread = history_units(life.transforms, mean, spread)   # the data's units
    event = {"event": kind, "segment": int(sid), "row": int(row),
             "weight": float(weight), "mean": np.asarray(mean).tolist(),
             "spread": np.asarray(spread).tolist(), **more}
    life.events.append(event)
    payload = {
        "schema_version": PAYLOAD_SCHEMA_VERSION,
        "id": lifecycle_alert_id(kind, sid),
        "kind": "lifecycle",
        "status": kind,
        "severity": "warning",
        "segment": int(sid),
        "statistic": "segments",
        "model_version": {"first": life.version, "last": life.version},
        "rows": {"first": int(row), "last": int(row)},
        "inputs": [life.file] if life.file else [],
        "explanation": {"summary": summary,
                        "mean": dict(zip(life.features, event["mean"])),
                        "spread": dict(zip(life.features, event["spread"])),
                        "weight": event["weight"],
                        **{k: v for k, v in more.items()}},
    }
    life.alerts.append((f"{payload['id']}.{kind}", payload))

def history_with_events(events: list[dict], rows: list[HistoryRow]) -> list[HistoryRow]:
    """The segment history of this version with the events marked; a segment that
    left gets a row of its own (weight 0, its last mean and spread)."""
    notes: dict[int, list[str]] = {}
    last: dict[int, dict] = {}
    for e in events:
        text = {"born": "born", "retired": "retired",
                "merged": f"merged into {e.get('into')}",
                "split": f"split, part {e.get('new')} new"}[e["event"]]
        notes.setdefault(e["segment"], []).append(f"{text} at row {e['row']}")
        if e["event"] == "merged":
            notes.setdefault(e["into"], []).append(
                f"absorbed {e['segment']} at row {e['row']}")
        if e["event"] == "split":
            notes.setdefault(e["new"], []).append(
                f"split from {e['segment']} at row {e['row']}")
        last[e["segment"]] = e
    out = []
    for r in rows:
        if r.segment in notes:
            r = replace(r, event="; ".join(notes.pop(r.segment)))
        out.append(r)
    for sid in sorted(notes):
        e = last.get(sid)
        if e is None:
            continue
        out.append(HistoryRow(segment=sid, weight=0.0, rows=0, mean=e["mean"],
                              spread=e["spread"], event="; ".join(notes[sid])))
    return out

def log_lifecycle_alerts(alerts, model_version: int) -> None:
    """One log line per event; called once they are committed."""
    for _, payload in alerts:
        log_event(f"segment_{payload['status']}", logging.INFO, id=payload["id"],
                  segment=payload["segment"], model_version=model_version,
                  row=payload["rows"]["first"],
                  summary=payload["explanation"]["summary"])
