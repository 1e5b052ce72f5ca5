"""``shoal report``: one self-contained HTML file with the segment history in pictures.

Everything comes from the state store and the labels files, read-only (the report
can be made beside a running service): the segment history, the alerts, the
latest checkpoint (current segments, baseline bands), each input's place on the
x axis and its fit (:mod:`shoal.daemon.views.timeline`: data time when
``drift.time_column`` is set, else stream rows) and a sample of recent rows (the
committed inputs in ``processed/``, or the inbox when inputs are kept, joined row
by row with their labels files). Images are PNG, embedded as
``data:`` URIs; the page has no script and loads nothing from elsewhere.
"""
from __future__ import annotations

import base64
import datetime as _dt
import html
import json
import math
import re
import time
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

import numpy as np
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from shoal.config import Settings
from shoal.core import Mixture
from shoal.daemon.model.contract import settings_of_model
from shoal.daemon.errors import InputRejected, UsageError
from shoal.daemon.intake.gate import input_kind
from shoal.daemon.files.layout import Layout
from shoal.daemon.ingest.claim import open_input
from shoal.daemon.runtime.progress import progress
from shoal.daemon.files.readers import read_input
from shoal.daemon.state.readout import StateReader, read_alerts, state_snapshot
from shoal.daemon.model.transforming import centres, from_meta
from shoal.daemon.state.compacted import compacted_totals
from shoal.daemon.segments.segment_names import segment_names
from shoal.daemon.views.timeline import Axis, axis_events, build_axis, parse_bound
from shoal.daemon.views.summary import format_differences

__all__ = ["REPORT_PLOTS", "parse_since", "report_data", "render_figures", "render_plots",
           "history_span", "build_report",
           "write_report", "recent_rows", "feature_units", "drift_bounds", "page_html"]

# id -> caption of every plot in the report (the status page shows the first and last).
REPORT_PLOTS = {
    "weights": "Segment weights over time",
    "means": "Each segment's mean per feature over time, with its baseline band",
    "drift": "Segment drift statistics against their bounds, with alert markers",
    "fit": "Fit of the whole model (fit_drop) against its bound, with alert markers",
    "pca": "Recent rows in the two most informative directions (PCA), with 2-sd ellipses",
}

_SINCE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(s|min|m|h|d|w)\s*$")
_UNIT_SECONDS = {"s": 1, "m": 60, "min": 60, "h": 3600, "d": 86400, "w": 604800}


def parse_since(text: str | None, now: float | None = None) -> float | None:
    """``'24h'``, ``'30min'``, ``'7d'`` (ago) or an ISO 8601 date/time (UTC if no zone)."""
    if text is None:
        return None
    now = time.time() if now is None else now
    m = _SINCE.match(text)
    if m:
        return now - float(m.group(1)) * _UNIT_SECONDS[m.group(2)]
    try:
        when = _dt.datetime.fromisoformat(text.strip())
    except ValueError:
        raise UsageError(f"--since: expected a duration such as 24h, 30min, 7d or an ISO "
                         f"date/time such as 2026-05-01T08:00, found {text!r}") from None
    if when.tzinfo is None:
        when = when.replace(tzinfo=_dt.timezone.utc)
    return when.timestamp()


def feature_units(settings: Settings) -> dict[str, str]:
    """Units per feature when the config gives them; 'data units' otherwise."""
    given = getattr(settings, "units", None) or {}
    return {f: str(given.get(f, "data units")) if isinstance(given, Mapping) else "data units"
            for f in settings.features}


def drift_bounds(settings: Settings) -> dict[str, float]:
    """Statistic -> bound from the config's drift bounds, when that section exists."""
    drift = getattr(settings, "drift", None)
    bounds = getattr(drift, "bounds", None)
    if bounds is None:
        return {}
    out = {}
    for name in getattr(bounds, "__dataclass_fields__", {}):
        value = getattr(bounds, name)
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            out[name] = float(value)
    return out


def _read_labels(path: Path) -> np.ndarray:
    if path.name.endswith(".csv"):
        table = pacsv.read_csv(path, convert_options=pacsv.ConvertOptions(
            include_columns=["segment"]))
    else:
        table = pq.read_table(path, columns=["segment"])
    col = table.column("segment").to_numpy(zero_copy_only=False)
    return np.where(np.isnan(col.astype(float)), -1, col).astype(np.int64)


def recent_rows(reader: StateReader, settings: Settings, layout: Layout, *,
                versions: set[int] | None = None, max_rows: int = 3000,
                max_inputs: int = 8) -> tuple[np.ndarray, np.ndarray]:
    """A seeded sample of recent rows (data units) and their segments (-1: none).

    Inputs (of ``versions`` when given) are found in ``processed/`` (or the inbox when
    inputs are kept) by name and checked against the ledger's size; an input that has
    gone is skipped.
    """
    entries = [e for e in reversed(reader.ledger("committed"))
               if e.labels and (versions is None or e.model_version in versions)][:max_inputs]
    xs, segs = [], []
    for e in entries:
        src = (layout.inbox if settings.output.keep_inputs else layout.processed) / e.name
        labels = layout.outbox / e.labels
        kind = input_kind(e.name)
        try:
            if kind is None or not labels.exists() or src.stat().st_size != e.size:
                continue
            with open_input(src) as f:
                frame = read_input(f, kind, settings)
            seg = _read_labels(labels)
        except (OSError, InputRejected):
            continue
        if len(seg) != frame.n_rows:
            continue
        xs.append(frame.features[frame.valid])
        segs.append(seg[frame.valid])
    if not xs:
        return np.empty((0, len(settings.features))), np.empty(0, dtype=np.int64)
    X, s = np.concatenate(xs), np.concatenate(segs)
    if len(X) > max_rows:
        keep = np.sort(np.random.default_rng(settings.seed).choice(len(X), max_rows,
                                                                   replace=False))
        X, s = X[keep], s[keep]
    return X, s


def _baseline_bands(extra: Mapping[str, Any], history: Sequence[Mapping],
                     transforms=None) -> dict:
    """Segment id -> (means, sds): the stored baseline if there is one, else
    each segment's first recorded state (the history is in the data's units already;
    the snapshot is in the model's, mapped back with ``transforms``)."""
    ref = None
    if isinstance(extra, Mapping):  # the drift watch keeps it in extra["drift"]
        drift = extra.get("drift")
        ref = extra.get("baseline") or (drift.get("baseline") if isinstance(drift, Mapping)
                                         else None)
    out: dict[int, tuple] = {}
    if isinstance(ref, Mapping) and ref.get("ids") and ref.get("means"):
        covs = ref.get("covariances") or []
        for i, sid in enumerate(ref["ids"]):
            mean = np.asarray(ref["means"][i], float)
            sd = (np.sqrt(np.diag(np.asarray(covs[i], float))) if i < len(covs)
                  else np.zeros_like(mean))
            out[int(sid)] = (mean, sd)
        return _bands_in_data_units(out, transforms)
    for h in history:
        out.setdefault(int(h["segment"]), (np.asarray(h["mean"]), np.asarray(h["spread"])))
    return out


def _fit_points(reader: StateReader, axis: Axis) -> list[tuple[int, float]]:
    """(model version, fit_drop) of each input with a known baseline in force: the
    baseline's mean log-density per row (kept checkpoints record each baseline and the
    version it was taken at) minus the input's mean, from its labels file."""
    taken: dict[int, float] = {}
    for (extra,) in reader.db.execute("SELECT extra FROM checkpoints ORDER BY version"):
        drift = json.loads(extra).get("drift") or {}
        ref, info = drift.get("baseline"), drift.get("baseline_info")
        if isinstance(ref, Mapping) and isinstance(info, Mapping) and \
                isinstance(ref.get("log_density"), (int, float)) and \
                info.get("model_version") is not None:
            taken[int(info["model_version"])] = float(ref["log_density"])
    if not taken:
        return []
    applied = sorted(int(r["model_version"]) for r in reader.rebaselines()
                     if r.get("applied") is not None and r.get("model_version") is not None)
    starts = sorted(taken)
    out = []
    for v, ld in sorted(axis.fit.items()):
        at = [m for m in starts if m <= v]
        if not at:
            continue
        m = at[-1]
        if any(m < r < v and r not in taken for r in applied):
            continue          # a baseline taken in between that no kept checkpoint records
        out.append((v, taken[m] - ld))
    return out


def report_data(reader: StateReader, settings: Settings, layout: Layout, *,
                since: str | None = None, until: str | None = None,
                now: float | None = None) -> dict[str, Any]:
    """Everything the report draws, read from the state.

    ``since``/``until`` are in the units of the x axis (:func:`timeline.parse_bound`):
    data time when ``drift.time_column`` is set, else stream rows.
    """
    now = time.time() if now is None else now
    configured = settings   # the stored model's names win for what is drawn
    settings, _ = settings_of_model(reader, settings)
    pruned = compacted_totals(reader.db).get("committed", {}).get("rows", 0)
    axis = build_axis(reader.ledger("committed"), layout.outbox, settings.drift.time_column,
                      rows_before=pruned, time_unit=settings.drift.time_unit,
                      time_format=settings.drift.time_format)
    lo = parse_bound(since, axis, "--since")
    hi = parse_bound(until, axis, "--until")
    if lo is not None and hi is not None and hi < lo:
        raise UsageError(f"--until ({until}) is before --since ({since})")
    shown = {v for v, x in axis.x.items()
             if (lo is None or x >= lo) and (hi is None or x <= hi)}
    all_history = reader.history()
    history = [h for h in all_history if h["version"] in shown]
    spans = [axis.span[v] for v in shown if v in axis.span]
    view = None
    if spans:   # the shown inputs' data, cut to the range asked for
        view = (max(min(a for a, _ in spans), -math.inf if lo is None else lo),
                min(max(b for _, b in spans), math.inf if hi is None else hi))
    events = [e for e in axis_events(axis, all_history, reader.rebaselines())
              if e["version"] in shown]
    cp = reader.latest_checkpoint()
    means, covs = {}, {}
    if cp is not None:
        m = Mixture.from_state(cp.arrays, cp.meta)
        for k, sid in enumerate(m.ids.tolist()):
            means[int(sid)] = m.data_means()[k]
            covs[int(sid)] = m.data_covariance_matrices()[k]
    X, seg = recent_rows(reader, settings, layout,
                         versions=shown if (lo is not None or hi is not None) else None)
    if cp is not None:   # the PCA view shares the model's (transformed) units
        transforms = from_meta(cp.meta, len(settings.features))
        if not transforms.identity and len(X):
            Y, inside = transforms.forward(X)
            X, seg = Y[inside], seg[inside]
    alerts = read_alerts(reader)
    if lo is not None or hi is not None:
        alerts = [a for a in alerts if _alert_version(a) in shown]
    return {
        "snapshot": state_snapshot(reader, configured, layout, now=now, recent_alerts=50),
        "history": history,
        "baseline": _baseline_bands(
            cp.extra if cp else {}, all_history,
            from_meta(cp.meta, len(settings.features)) if cp else None),
        "alerts": alerts,
        "means": means,
        "covariances": covs,
        "sample": (X, seg),
        "units": feature_units(settings),
        # a transformed feature is drawn by its median (band: central 68% interval)
        "centres": {f: "median" for f, k in zip(settings.features, settings.transform_kinds)
                    if k != "none"},
        "bounds": drift_bounds(settings),
        "features": list(settings.features),
        "names": segment_names(reader.db),
        "axis": axis,
        "view": view,
        "events": events,
        "fit": [(v, y) for v, y in _fit_points(reader, axis) if v in shown],
        "since": lo,
        "until": hi,
        "shown_inputs": len(shown),
        "now": now,
    }


def _alert_version(alert: Mapping[str, Any]) -> int | None:
    mv = alert.get("model_version")
    v = mv.get("last") if isinstance(mv, Mapping) else alert.get("version")
    return None if v is None else int(v)


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


def _fmt(v: Any) -> str:
    if isinstance(v, float):
        return f"{v:.4g}"
    if v is None:
        return "-"
    return str(v)


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


def _bands_in_data_units(bands: dict, transforms) -> dict:
    """Baseline bands of transformed features as (centre, half-width) of their central
    68% interval in the data's units, so that ``centre -+ half-width`` is that interval."""
    if transforms is None or transforms.identity:
        return bands
    out = {}
    for sid, (mean, sd) in bands.items():
        _, low, high = centres(transforms, np.asarray(mean)[None], np.asarray(sd)[None])
        keep = np.array([k == "none" for k in transforms.kinds])
        mid, half = (low[0] + high[0]) / 2, (high[0] - low[0]) / 2
        out[sid] = (np.where(keep, mean, mid), np.where(keep, sd, half))
    return out


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
                    f"<td>{_fmt(s.get('age_versions'))}</td>{cells}</tr>")
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
            expl = (f"{top.get('feature')}: {_fmt(top.get('baseline_mean'))} → "
                    f"{_fmt(top.get('window_mean'))} ({_fmt(top.get('shift_sd'))} sd)")
        elif isinstance(expl, Mapping):
            expl = expl.get("summary") or expl.get("text") or ""
        rows.append(
            f"<tr><td class=\"l\">{_utc(a.get('created'))}</td>"
            f"<td class=\"l {status}\">{status}</td>"
            f"<td class=\"l\">{html.escape(str(a.get('severity', '')))}</td>"
            f"<td>{html.escape(_fmt(a.get('segment')))}"
            + (f" ({html.escape(str(a['segment_name']))})" if a.get("segment_name") else "")
            + "</td>"
            f"<td class=\"l\">{html.escape(_fmt(a.get('statistic')))}</td>"
            f"<td>{html.escape(_fmt(a.get('value')))}</td>"
            f"<td>{html.escape(_fmt(a.get('bound')))}</td>"
            f"<td class=\"l\">{html.escape(_fmt(expl) if expl else '')}</td></tr>")
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
