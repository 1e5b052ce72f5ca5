"""``shoal report``: one self-contained HTML file with the segment history in pictures.

Draws what :mod:`shoal.daemon.views.report_data` gathered, read-only (the report can
be made beside a running service): the plots (:mod:`shoal.daemon.views.plots`), the
current segments and recent alerts as tables, and the page around them; the status
page (:mod:`shoal.daemon.views.status_page`) uses the same pieces. Images are PNG,
embedded as ``data:`` URIs; the page has no script and loads nothing from elsewhere.
The gathering functions are re-exported here (``__all__``) for the commands and the
endpoint that call them.
"""
from __future__ import annotations

import base64
import datetime as _dt
import html
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

from shoal.config import Settings
from shoal.daemon.files.layout import Layout
from shoal.daemon.runtime.progress import progress
from shoal.daemon.state.readout import StateReader
from shoal.daemon.views.report_data import (
    drift_bounds,
    feature_units,
    parse_since,
    recent_rows,
    report_data,
)
from shoal.daemon.views.status_text import number_text
from shoal.daemon.views.summary import format_differences

__all__ = ["REPORT_PLOTS", "parse_since", "report_data", "render_figures", "render_plots",
           "history_span", "build_report", "segments_table", "alerts_table", "figure_html",
           "write_report", "recent_rows", "feature_units", "drift_bounds", "page_html"]

# id -> caption of every plot in the report (the status page shows the PAGE_PLOTS of
# shoal.daemon.views.status_page).
REPORT_PLOTS = {
    "weights": "Segment weights over time",
    "means": "Each segment's mean per feature over time, with its baseline band",
    "drift": "Segment drift statistics against their bounds, with alert markers",
    "fit": "Fit of the whole model (fit_drop) against its bound, with alert markers",
    "pca": "Recent rows in the two most informative directions (PCA), with 2-sd ellipses",
}


def render_figures(data: Mapping[str, Any], which: Sequence[str] = tuple(REPORT_PLOTS),
                   wrap: Callable = lambda items, **kw: items) -> dict[str, Any]:
    """The matplotlib figure of each plot id in ``which`` (what tests inspect)."""
    from shoal.daemon.views import plots

    axis, events, view = data["axis"], data["events"], data["view"]
    names = data.get("names") or {}
    makers = {
        "weights": lambda: plots.weights_figure(data["history"], axis, events, view, names),
        "means": lambda: plots.means_figure(data["history"], data["features"], data["units"],
                                            data["baseline"], axis, events, view, names,
                                            data.get("centres")),
        "drift": lambda: plots.drift_figure(data["history"], data["bounds"], data["alerts"],
                                            axis, events, view, names),
        "fit": lambda: plots.fit_figure(data["fit"], data["bounds"].get("fit_drop"),
                                        data["alerts"], axis, events, view),
        "pca": lambda: plots.pca_figure(data["sample"][0], data["sample"][1], data["means"],
                                        data["covariances"], data["features"]),
    }
    return {name: makers[name]() for name in wrap(list(which), total=len(which),
                                                  desc="plots", unit="plot")}


def render_plots(data: Mapping[str, Any], which: Sequence[str] = tuple(REPORT_PLOTS),
                 wrap: Callable = lambda items, **kw: items) -> dict[str, bytes]:
    """PNG bytes of each plot id in ``which``."""
    from shoal.daemon.views.plots import png

    return {name: png(fig) for name, fig in render_figures(data, which, wrap).items()}


def history_span(data: Mapping[str, Any]) -> str:
    """What the plots cover, in words: '30 inputs, 2026-01-01 00:00 UTC to ... (data time,
    column timestamp)'; never empty."""
    axis, view, n = data["axis"], data["view"], data["shown_inputs"]
    if view is None or not n:
        return "history: no inputs committed yet" if not axis.x else \
            "history: no inputs in the range asked for"
    what = {"time": f"data time, column {axis.column}",
            "number": f"column {axis.column}, in its own units", "rows": "stream rows"}[axis.kind]
    scope = "all " if data["since"] is None and data["until"] is None else ""
    out = (f"history: {scope}{n} input{'s' if n != 1 else ''}, {axis.describe(view[0])} to "
           f"{axis.describe(view[1])} ({what})")
    if axis.left_out:
        out += f"; {axis.left_out} without a readable time left out"
    return out


def _utc(t: float | None) -> str:
    if t is None:
        return "-"
    return _dt.datetime.fromtimestamp(t, _dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")


_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:1.5rem auto;
max-width:1100px;padding:0 1rem;color:#1a1a1a;line-height:1.4}
h1{font-size:1.6rem;margin-bottom:.2rem}h2{font-size:1.2rem;margin-top:2rem;
border-bottom:1px solid #ccc;padding-bottom:.2rem}
table{border-collapse:collapse;font-size:.9rem;margin:.5rem 0}
th,td{border:1px solid #ccc;padding:.25rem .5rem;text-align:right}
th{background:#f2f2f2}td.l,th.l{text-align:left}
figure{margin:1rem 0}figure img{max-width:100%;height:auto;border:1px solid #ddd}
figcaption{font-size:.9rem;color:#444}.meta{color:#444;font-size:.9rem}
.raised{color:#D55E00;font-weight:bold}.cleared{color:#0072B2}
.swatch{display:inline-block;width:.8em;height:.8em;margin-right:.3em;vertical-align:middle}
"""


def segments_table(snap: Mapping[str, Any], units: Mapping[str, str]) -> str:
    from shoal.daemon.views.plots import segment_style

    feats = snap["features"]
    median = snap["segments"][0].get("median", {}) if snap["segments"] else {}
    head = "".join(f"<th>{html.escape(f)} {'median [68%]' if f in median else 'mean ± sd'}"
                   f"<br>({html.escape(units.get(f, ''))})</th>" for f in feats)
    rows = []
    named = any(s.get("name") for s in snap["segments"])
    for s in snap["segments"]:
        colour = segment_style(s["id"])["color"]
        cells = "".join(
            f"<td>{s['median'][f]:.4g} [{s['interval'][f][0]:.4g}, {s['interval'][f][1]:.4g}]"
            "</td>" if f in s.get("interval", {}) else
            f"<td>{s['mean'][f]:.4g} ± {s['spread'][f]:.3g}</td>" for f in feats)
        rows.append(f'<tr data-segment="{s["id"]}"><td class="l">'
                    f'<span class="swatch" style="background:{colour}"></span>{s["id"]}</td>'
                    + (f'<td class="l name">{html.escape(s.get("name") or "")}</td>'
                       if named else "") +
                    f"<td>{s['weight']:.3f}</td><td>{s['rows']}</td>"
                    f"<td>{number_text(s.get('age_versions'))}</td>{cells}</tr>")
    if not rows:
        w = snap.get("warmup") or {}
        return (f"<p id=\"no-segments\">No model yet: the warm-up has {w.get('rows', 0)} of "
                f"{w.get('needed', '?')} rows.</p>")
    return ('<table id="segments"><thead><tr><th class="l">segment</th>'
            + ('<th class="l">name</th>' if named else "") + "<th>weight</th>"
            f"<th>rows</th><th>age (inputs)</th>{head}</tr></thead><tbody>"
            + "".join(rows) + "</tbody></table>")


def alerts_table(alerts: Sequence[Mapping[str, Any]], limit: int = 50) -> str:
    if not alerts:
        return '<p id="no-alerts">No alerts.</p>'
    rows = []
    for a in alerts[:limit]:
        status = html.escape(str(a.get("status", "")))
        expl = a.get("explanation")
        if isinstance(expl, (list, tuple)) and expl and isinstance(expl[0], Mapping):
            top = expl[0]
            expl = (f"{top.get('feature')}: {number_text(top.get('baseline_mean'))} → "
                    f"{number_text(top.get('window_mean'))} ({number_text(top.get('shift_sd'))} sd)")
        elif isinstance(expl, Mapping):
            expl = expl.get("summary") or expl.get("text") or ""
        rows.append(
            f"<tr><td class=\"l\">{_utc(a.get('created'))}</td>"
            f"<td class=\"l {status}\">{status}</td>"
            f"<td class=\"l\">{html.escape(str(a.get('severity', '')))}</td>"
            f"<td>{html.escape(number_text(a.get('segment')))}"
            + (f" ({html.escape(str(a['segment_name']))})" if a.get("segment_name") else "")
            + "</td>"
            f"<td class=\"l\">{html.escape(number_text(a.get('statistic')))}</td>"
            f"<td>{html.escape(number_text(a.get('value')))}</td>"
            f"<td>{html.escape(number_text(a.get('bound')))}</td>"
            f"<td class=\"l\">{html.escape(number_text(expl) if expl else '')}</td></tr>")
    return ('<table id="alerts"><thead><tr><th class="l">time</th><th class="l">status</th>'
            '<th class="l">severity</th><th>segment</th><th class="l">statistic</th>'
            '<th>value</th><th>bound</th><th class="l">what moved</th></tr></thead><tbody>'
            + "".join(rows) + "</tbody></table>")


def figure_html(name: str, png: bytes, caption: str) -> str:
    b64 = base64.b64encode(png).decode("ascii")
    return (f'<figure id="plot-{name}"><img alt="{html.escape(caption)}" '
            f'src="data:image/png;base64,{b64}"><figcaption>{html.escape(caption)}'
            "</figcaption></figure>")


def page_html(title: str, body: str, refresh_seconds: int | None = None) -> str:
    refresh = (f'<meta http-equiv="refresh" content="{int(refresh_seconds)}">'
               if refresh_seconds else "")
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            '<meta name="viewport" content="width=device-width, initial-scale=1">'
            f'{refresh}<link rel="icon" href="data:,"><title>{html.escape(title)}</title>'
            f"<style>{_CSS}</style></head><body>{body}</body></html>\n")


def build_report(data: Mapping[str, Any], pngs: Mapping[str, bytes], config: str) -> str:
    snap = data["snapshot"]
    n = {k: v["inputs"] for k, v in snap["inputs"].items()}
    head = (f"<h1>shoal report</h1><p class=\"meta\">Config {html.escape(config)} · made "
            f"{_utc(data['now'])} · model version {snap['model_version']} · inputs "
            + html.escape(", ".join(f"{v} {k}" for k, v in sorted(n.items())) or "none")
            + f" · {html.escape(history_span(data))}</p>")
    differs = format_differences(snap.get("config_differs", []))
    if differs:
        head += ('<p class="meta" id="config-differs">' + html.escape(differs[0]) + "<br>"
                 + "<br>".join(html.escape(line.strip()) for line in differs[1:]) + "</p>")
    toc = "<ul>" + "".join(f'<li><a href="#plot-{k}">{html.escape(v)}</a></li>'
                           for k, v in REPORT_PLOTS.items()) + (
        '<li><a href="#current-segments">Current segments</a></li>'
        '<li><a href="#recent-alerts">Recent alerts</a></li></ul>')
    figs = "".join(f"<h2>{html.escape(REPORT_PLOTS[k])}</h2>" + figure_html(k, pngs[k],
                                                                         REPORT_PLOTS[k])
                   for k in REPORT_PLOTS if k in pngs)
    body = (head + toc + figs
            + '<h2 id="current-segments">Current segments</h2>'
            + segments_table(snap, data["units"])
            + '<h2 id="recent-alerts">Recent alerts</h2>' + alerts_table(data["alerts"]))
    return page_html("shoal report", body)


def write_report(reader: StateReader, settings: Settings, layout: Layout, out: Path, *,
                 config: str, since: str | None = None, until: str | None = None) -> Path:
    """Build the report and write it atomically to ``out``."""
    from shoal.daemon.files.writer import atomic_file

    data = report_data(reader, settings, layout, since=since, until=until)
    pngs = render_plots(data, wrap=progress)
    text = build_report(data, pngs, config)
    with atomic_file(Path(out), mode=0o644) as f:
        f.write(text.encode("utf-8"))
    return out
