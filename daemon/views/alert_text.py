"""An alert notification as text: ``shoal alerts``, ``shoal rebaseline``, ``shoal replay``
and the demo print it.

Draws a notification's stored payload (plain data in, text out): what was raised or
cleared, where in the stream, and the explanation the segment watch wrote.
"""
from __future__ import annotations

import datetime as _dt

from shoal.daemon.views.status_text import number_text

__all__ = ["format_alert"]


def format_alert(payload: dict, created: float | None = None, prefix: str = "") -> str:
    """Two or three lines: what was raised, where in the stream, and the explanation."""
    p = payload
    when = "" if created is None else _dt.datetime.fromtimestamp(
        created, _dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%S ")
    seg = "whole model" if p.get("segment") == "all" else f"segment {p.get('segment')}"
    if p.get("segment_name"):
        seg += f" ({p['segment_name']})"
    head = (f"{prefix}{when}{p.get('status', '?').upper():8s} {p.get('severity', ''):8s} "
            f"{seg}  {p.get('statistic')} {number_text(p.get('value'))} (bound {number_text(p.get('bound'))}, "
            f"noise {number_text(p.get('noise'))}; {p.get('unit', '')})  id {p.get('id')}")
    if p.get("kind") == "lifecycle":     # born, retired, merged: an event, not a bound
        head = (f"{prefix}{when}{p.get('status', '?').upper():8s} {p.get('severity', ''):8s} "
                f"{seg}  id {p.get('id')}")
    rows, mv = p.get("rows") or {}, p.get("model_version") or {}
    where = (f"{prefix}    rows {number_text(rows.get('first'))}-{number_text(rows.get('last'))}, model versions "
             f"{number_text(mv.get('first'))}-{number_text(mv.get('last'))}")
    if p.get("time"):
        where += f", time {p['time']['first']} .. {p['time']['last']}"
    if p.get("inputs"):
        files = p["inputs"]
        where += f", inputs {', '.join(files[:4])}" + (f" (+{len(files) - 4})" if len(files) > 4
                                                       else "")
    if p.get("cleared_by"):
        where += f", cleared by {p['cleared_by']}: {p.get('note')!r}"
    lines = [head, where]
    summary = (p.get("explanation") or {}).get("summary")
    if summary:
        lines.append(f"{prefix}    {summary}")
    return "\n".join(lines)
