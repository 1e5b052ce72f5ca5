"""The current segments as a text table (``shoal segments``), and the config's differences.

Draws what :func:`~shoal.daemon.state.readout.segment_summary` read from the state
(plain data in, text out; re-exported here for the commands that print it); the
status screen and the report use :func:`format_differences` for the same lines.
"""
from __future__ import annotations

from shoal.config import shown
from shoal.daemon.state.readout import segment_summary

__all__ = ["segment_summary", "format_segments", "format_differences"]


def _cell(s: dict, f: str) -> str:
    """One feature of a segment: ``mean±sd``, or ``median [low, high]`` if transformed."""
    if f in s.get("interval", {}):
        low, high = s["interval"][f]
        return f"{_num(s['median'][f])} [{_num(low)}, {_num(high)}]"
    return f"{_num(s['mean'][f])}±{_num(s['spread'][f])}"


def _num(v: float) -> str:
    return f"{v:.4g}"


def format_differences(differs: list[dict]) -> list[str]:
    """Lines saying how the config differs from the stored model (none when it does not)."""
    if not differs:
        return []
    return ["the config differs from the stored model (shown as stored; commands that "
            "learn refuse this config):"] + [
        f"  {d['key']}: stored {shown(d['stored'])}, configured {shown(d['configured'])}"
        for d in differs]


def format_segments(summary: dict) -> str:
    """A plain-text table: one line per segment, mean ± spread per feature."""
    differences = format_differences(summary.get("config_differs", []))
    if summary["model_version"] is None:
        w = summary.get("warmup", {})
        return "\n".join([f"no model yet: warm-up has {w.get('rows', 0)} of "
                          f"{w.get('needed', '?')} rows (from {w.get('inputs', 0)} inputs)"]
                         + differences)
    lines = [f"model version {summary['model_version']}"] + differences
    lines[0] += f", {summary['rows_learned']} rows learned after warm-up"
    feats = summary["features"]
    first = summary["segments"][0]
    named = any(s.get("name") for s in summary["segments"])
    head = ["segment"] + (["name"] if named else []) + ["weight", "rows", "age"] + [
        f"{f} (median [68%])" if f in first.get("interval", {}) else f"{f} (mean±sd)"
        for f in feats]
    table = [head]
    for s in summary["segments"]:
        age = "-" if s["age_versions"] is None else f"{s['age_versions']} inputs"
        table.append([str(s["id"])] + ([s.get("name") or "-"] if named else []) +
                     [f"{s['weight']:.3f}", str(s["rows"]), age] +
                     [_cell(s, f) for f in feats])
    widths = [max(len(r[i]) for r in table) for i in range(len(head))]
    for r in table:
        lines.append("  ".join(c.ljust(w) if i == 1 and named else c.rjust(w)
                               for i, (c, w) in enumerate(zip(r, widths))))
    if summary.get("gone"):
        lines.append("segments no longer in the model (last mean±sd):")
        for g in summary["gone"]:
            name = f" ({g['name']})" if g.get("name") else ""
            lines.append(f"  {g['id']:>3}{name}  {g['ended']} (model version "
                         f"{g['ended_version']})  " +
                         "  ".join(f"{f} {_num(g['mean'][f])}±{_num(g['spread'][f])}"
                                   for f in feats))
    return "\n".join(lines)
