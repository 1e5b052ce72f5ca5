"""The HTML status page (``/``): the service's facts, current segments, recent alerts and
the key plots.

Draws a snapshot that :func:`~shoal.daemon.state.readout.state_snapshot` read, with
the plots the report draws (plain data in, HTML out); the HTTP endpoint
(:mod:`shoal.daemon.runtime.status_http`) serves it and keeps the plots between model
versions.
"""
from __future__ import annotations

import html
from typing import Mapping

from shoal.daemon.views.report import (
    REPORT_PLOTS,
    alerts_table,
    figure_html,
    page_html,
    segments_table,
)
from shoal.daemon.views.status_text import format_service

__all__ = ["PAGE_PLOTS", "REFRESH_SECONDS", "status_page_html"]

PAGE_PLOTS = ("weights", "drift", "fit", "pca")  # of report.REPORT_PLOTS: the key ones for the page
REFRESH_SECONDS = 30


def status_page_html(snap: dict, pngs: Mapping[str, bytes], units: Mapping[str, str]) -> str:
    """The page for ``snap`` (with its ``health``, ``ready`` and ``live`` parts), the PNG of
    each of :data:`PAGE_PLOTS` and each feature's units."""
    now = snap["time"]
    h, r = snap["health"], snap["ready"]
    last = snap["last_input"]
    lag = snap["backlog"]["lag_seconds"]
    facts = [
        ("service", format_service(snap.get("service"), now).split(": ", 1)[1]),
        ("health", h["status"]),
        ("ready", r["status"]),
        ("model version", snap["model_version"]),
        ("last input", "none yet" if last is None else
         f"{last['name']} ({last['outcome']}, {now - last['time']:.0f} s ago)"),
        ("waiting in the inbox", snap["backlog"]["files"]),
        ("lag", "-" if lag is None else f"{lag:.1f} s"),
        ("queue depth", snap["live"].get("queue_depth", "-")),
        ("quarantine", _quarantine_fact(snap.get("quarantine") or {})),
        ("last error", "none" if snap["last_error"] is None else
         f"{snap['last_error']['name']}: {snap['last_error']['reason']}"),
    ]
    rows = "".join(f'<tr><th class="l">{html.escape(k)}</th><td class="l">'
                   f"{html.escape(str(v))}</td></tr>" for k, v in facts)
    body = ("<h1>shoal status</h1>"
            f'<p class="meta">Refreshes every {REFRESH_SECONDS} s · '
            '<a href="/status">JSON</a> · <a href="/metrics">metrics</a></p>'
            f'<table id="facts">{rows}</table>'
            "<h2>Current segments</h2>"
            + segments_table(snap, units)
            + "<h2>Recent alerts</h2>" + alerts_table(snap["recent_alerts"])
            + "".join(f"<h2>{html.escape(REPORT_PLOTS[k])}</h2>"
                      + figure_html(k, pngs[k], REPORT_PLOTS[k]) for k in PAGE_PLOTS))
    return page_html("shoal status", body, refresh_seconds=REFRESH_SECONDS)


def _quarantine_fact(q: dict) -> str:
    """The quarantine's line of facts: how many inputs, and the latest with its reason."""
    latest = q.get("latest")
    text = f"{q.get('count', 0)} input(s)"
    if latest:
        text += f"; latest {latest['name']}: {latest['reason']} ({latest['detail']})"
    return text
