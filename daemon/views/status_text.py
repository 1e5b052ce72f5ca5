"""The status screen as text: ``shoal status`` and the service line of the status page.

Draws what :func:`~shoal.daemon.state.readout.state_snapshot` read (plain data in,
text out); it opens nothing and reads no state itself, so the same snapshot can be
shown on a terminal, served as JSON or put on the HTML page.
"""
from __future__ import annotations

from shoal.daemon.views.summary import format_differences

__all__ = ["format_status", "format_service", "ago", "number_text"]


def ago(seconds: float | None) -> str:
    """A duration as a short text: '3.2 s', '4.0 min', '1.5 h', '2.0 d'; '-' for None."""
    if seconds is None:
        return "-"
    seconds = max(0.0, seconds)
    for unit, size in (("d", 86400), ("h", 3600), ("min", 60)):
        if seconds >= size:
            return f"{seconds / size:.1f} {unit}"
    return f"{seconds:.1f} s"


def number_text(v) -> str:
    """A value as shown in a table: a float to 4 significant digits, None as '-'."""
    return f"{v:.4g}" if isinstance(v, float) else "-" if v is None else str(v)


def format_status(snap: dict, width: int = 100) -> str:
    """One terminal screen: model, inputs, lag, segments, alerts, last error."""
    now = snap["time"]
    lines = [format_service(snap.get("service"), now)]
    inputs = snap["inputs"]
    n = {k: v["inputs"] for k, v in inputs.items()}
    lines.append(f"model version {snap['model_version']}"
                 + (f", {snap['rows_learned']} rows learned" if snap.get("rows_learned") else ""))
    lines += format_differences(snap.get("config_differs", []))
    lines.append("inputs: " + (", ".join(f"{v} {k}" for k, v in sorted(n.items())) or "none yet"))
    last = snap["last_input"]
    if last:
        lines.append(f"last input: {last['name']} ({last['outcome']}, "
                     f"{ago(now - last['time'])} ago)")
    b = snap["backlog"]
    lines.append(f"waiting in the inbox: {b['files'] if b['files'] is not None else '?'} "
                 f"file(s); lag {ago(b['lag_seconds'])}; last commit "
                 + (f"{ago(now - snap['last_commit_time'])} ago" if snap["last_commit_time"]
                    else "never"))
    if snap.get("warmup"):
        w = snap["warmup"]
        lines.append(f"warming up: {w['rows']} of {w['needed']} rows buffered")
    if snap["segments"]:
        lines.append("")
        feats = list(snap["features"])
        median = snap["segments"][0].get("median", {})   # transformed features
        named = any(s.get("name") for s in snap["segments"])
        fixed = 4 if named else 3
        head = ["segment"] + (["name"] if named else []) + ["weight", "rows"] + \
            [f"{f} median" if f in median else f"{f} mean" for f in feats]
        table = [head] + [[str(s["id"])] + ([s.get("name") or "-"] if named else [])
                          + [f"{s['weight']:.3f}", str(s["rows"])]
                          + [f"{s['mean'][f]:.4g}" for f in feats] for s in snap["segments"]]
        widths = [max(len(r[i]) for r in table) for i in range(len(head))]
        shown = len(head)   # whole columns only, as many as fit the screen
        while shown > fixed and sum(widths[:shown]) + 2 * (shown - 1) > width:
            shown -= 1
        for r in table:
            lines.append("  ".join(c.ljust(w) if named and i == 1 else c.rjust(w)
                                   for i, (c, w) in enumerate(zip(r[:shown], widths))))
        if shown < len(head):
            lines.append(f"(+{len(head) - shown} more features: shoal segments -c CONFIG)")
    lines.append("")
    counts = snap["alert_counts"]
    lines.append(f"alerts: {snap.get('alerts_active', 0)} active now; notifications: "
                 + (", ".join(f"{v} {k}" for k, v in sorted(counts.items())) or "none"))
    names = {s["id"]: s.get("name") for s in snap["segments"] if s.get("name")}
    for a in snap["recent_alerts"][:5]:
        seg = a.get("segment", "-")
        name = a.get("segment_name") or names.get(seg)
        lines.append(f"  {a.get('status', '?'):9s} {a.get('severity', '?'):8s} segment "
                     f"{seg}{f' ({name})' if name else ''} {a.get('statistic', '-')} "
                     f"value {number_text(a.get('value'))} bound {number_text(a.get('bound'))}"[:width])
    q = snap.get("quarantine") or {}
    latest = q.get("latest")
    lines.append(f"quarantine: {q.get('count', 0)} input(s)" + (
        f"; latest {latest['name']}: {latest['reason']} ({ago(now - latest['time'])} ago)"
        if latest else "")[:width])
    err = snap["last_error"]
    lines.append("last error: " + ("none" if err is None else
                                   f"{err['name']}: {err['reason']} "
                                   f"({ago(now - err['time'])} ago)"[:width]))
    failure = (snap.get("service") or {}).get("last_failure")
    if failure:
        lines.append(f"last worker failure: {failure.get('detail')} (pid {failure.get('pid')}, "
                     f"{ago(now - failure['time'])} ago)"[:width])
    return "\n".join(lines)


def format_service(service: dict | None, now: float) -> str:
    """'service: running, pid N, last progress 1.2 s ago' or 'service: not running ...'."""
    if not service:
        return "service: unknown"
    if service["running"]:
        text = f"service: running, pid {service['pid'] or '?'}"
        if service.get("last_progress") is not None:
            text += f", last progress {ago(now - service['last_progress'])} ago"
        if service.get("worker_alive") is False:
            text += " (its worker has stopped)"
        return text
    text = "service: not running"
    last = service.get("last_run")
    if last and last.get("pid"):
        when = last.get("stopped") or last.get("last_progress")
        text += (f" (last run pid {last['pid']}"
                 + (f", ended {ago(now - when)} ago" if when else "") + ")")
    return text
