"""The pictures of ``shoal report`` and the status page, drawn with matplotlib (Agg).

Each function takes plain data (the segment history, alerts, a sample of rows, the
x axis of :mod:`shoal.daemon.views.timeline`) and returns a ``matplotlib.figure.Figure``;
:func:`png` turns one into PNG bytes. Figures are made with the object API, never
``pyplot``, so drawing is safe off the main thread and leaves no global state, and
tests read what was drawn from the figure itself. Colours are the Okabe-Ito palette,
chosen to stay distinguishable with the common colour-vision deficiencies (Okabe &
Ito 2008, "Color Universal Design"); every segment also has its own pair of line
style and marker, so no plot relies on colour alone. Every plot has a title and axis
labels with units; every time axis marks re-baselines and lifecycle events.
"""
from __future__ import annotations

import datetime as _dt
import io
import math
from typing import Any, Mapping, Sequence

import matplotlib

matplotlib.use("Agg", force=False)
import matplotlib.dates as mdates  # noqa: E402
import matplotlib.ticker as ticker  # noqa: E402
import matplotlib.transforms as transforms  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402
from matplotlib.patches import Ellipse  # noqa: E402

__all__ = ["PALETTE", "EVENT_STYLES", "segment_style", "png", "weights_figure",
           "means_figure", "drift_figure", "fit_figure", "pca_figure", "message_figure"]

# Okabe-Ito, without black first (black is used for bounds and annotations).
PALETTE = ("#E69F00", "#56B4E9", "#009E73", "#0072B2", "#D55E00", "#CC79A7", "#F0E442",
           "#000000")
_LINESTYLES = ("-", "--", "-.", ":")
_MARKERS = ("o", "s", "^", "D", "v", "P", "X", "*", "<", ">", "p", "h")
_DPI = 100


def segment_style(segment_id: int) -> dict:
    """Colour, line style and marker of a segment id (stable across plots).

    The marker cycles every 12 ids and the line style moves on by one more each lap,
    so the first 48 ids all have different (line style, marker) pairs: two ids with
    the same marker are 12*d apart (d = 1..3) and their line styles d apart (mod 4).
    """
    i = int(segment_id)
    return {"color": PALETTE[i % len(PALETTE)],
            "linestyle": _LINESTYLES[(i + i // len(_MARKERS)) % len(_LINESTYLES)],
            "marker": _MARKERS[i % len(_MARKERS)]}


def png(fig: Figure) -> bytes:
    """The figure as PNG bytes."""
    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=_DPI)
    return buf.getvalue()


def message_figure(title: str, message: str, ylabel: str = "value",
                   xlabel: str = "") -> Figure:
    """A titled, labelled, empty plot that says why there is nothing to draw."""
    fig = Figure(figsize=(9, 2.6), layout="constrained")
    ax = fig.add_subplot()
    ax.set_title(title)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    ax.text(0.5, 0.5, message, ha="center", va="center", transform=ax.transAxes)
    ax.set_xticks([])
    ax.set_yticks([])
    return fig


def _xs(axis, values: Sequence[float]) -> list:
    """x values as matplotlib draws them: on a date axis matplotlib's date numbers (days
    since its epoch) of the UTC times, else the numbers; NaN (a break) for None/NaN."""
    out = [math.nan if v is None else float(v) for v in values]
    if axis is not None and axis.is_time:
        return [v if math.isnan(v) else float(mdates.date2num(
            _dt.datetime.fromtimestamp(v, _dt.timezone.utc))) for v in out]
    return out


def _finish_axis(ax, axis, view: tuple[float, float] | None, bottom: bool) -> None:
    """Ticks, limits and label of one panel's x axis.

    On data time: concise UTC dates. On stream rows: the input names as ticks when
    at most :data:`_NAMED_TICKS` inputs are in view, else row numbers.
    """
    if view is not None:
        lo, hi = view
        if hi <= lo:
            pad = 1.0 if axis.kind != "time" else 3600.0
            lo, hi = lo - pad, hi + pad
        ax.set_xlim(*_xs(axis, [lo, hi]))
    if axis.is_time:
        locator = mdates.AutoDateLocator(minticks=3, maxticks=7)
        ax.xaxis.set_major_locator(locator)
        ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator, show_offset=False))
        label = axis.label
        if view is not None:
            a, b = (_dt.datetime.fromtimestamp(x, _dt.timezone.utc) for x in view)
            if a.date() == b.date():
                label = f"{label}, {a:%Y-%m-%d}"
    else:
        label = axis.label
        named = [(x, axis.names[v]) for v, x in sorted(axis.x.items())
                 if v in axis.names and (view is None or view[0] <= x <= view[1])]
        if axis.kind == "rows" and 0 < len(named) <= _NAMED_TICKS:
            ax.set_xticks([x for x, _ in named])
            if bottom:
                ax.set_xticklabels([n for _, n in named], rotation=30, ha="right",
                                   fontsize="x-small")
                label = "end of each input along the stream (stream rows)"
            else:
                ax.set_xticklabels([])
        else:
            ax.xaxis.set_major_formatter(_ROW_FORMATTER)
    ax.set_xlabel(label if bottom else "")
    if bottom:   # a shared axis hides the ticks of all but the last row; a bottom panel
        ax.tick_params(axis="x", labelbottom=True)   # above an empty cell needs its own


_NAMED_TICKS = 12
_ROW_FORMATTER = ticker.FuncFormatter(lambda x, _pos: f"{x:,.0f}")

# Each kind of event: (marker, colour, legend label). Drawn at the top edge of every time
# axis with a thin vertical line through the panel.
EVENT_STYLES = {
    "rebaseline": ("D", "#000000", "re-baseline"),
    "born": ("^", "#009E73", "segment born"),
    "retired": ("v", "#555555", "segment retired"),
    "merged": ("<", "#CC79A7", "segments merged"),
    "split": (">", "#D55E00", "segment split"),
}


def _mark_events(ax, axis, events: Sequence[Mapping[str, Any]]) -> None:
    """Each event as a marker on the panel's top edge (one line per kind, labelled for
    the legend, ``gid`` ``event:<kind>``) and a faint vertical line."""
    by_kind: dict[str, list[float]] = {}
    for e in events:
        by_kind.setdefault(e["kind"], []).append(e["x"])
    top = transforms.blended_transform_factory(ax.transData, ax.transAxes)
    for kind in EVENT_STYLES:
        xs = by_kind.get(kind)
        if not xs:
            continue
        marker, colour, label = EVENT_STYLES[kind]
        for x in _xs(axis, xs):
            ax.axvline(x, color=colour, linewidth=0.8, alpha=0.35, linestyle=":", zorder=0)
        (line,) = ax.plot(_xs(axis, xs), [0.97] * len(xs), transform=top, linestyle="none",
                          marker=marker, markersize=7, markerfacecolor=colour,
                          markeredgecolor="black", clip_on=False, label=label, zorder=5)
        line.set_gid(f"event:{kind}")


def _segment_line(ax, axis, sid: int, xs, ys, names=None, **kw):
    """One segment's series with its own colour, line style and marker (``gid``
    ``segment:<id>``), labelled with its name if it has one; markers thinned to about
    a dozen per line."""
    st = segment_style(sid)
    n = len(xs)
    name = (names or {}).get(sid)
    (line,) = ax.plot(_xs(axis, xs), ys, color=st["color"], linestyle=st["linestyle"],
                      marker=st["marker"], markersize=4, markevery=max(1, n // 12),
                      label=f"segment {sid} ({name})" if name else f"segment {sid}", **kw)
    line.set_gid(f"segment:{sid}")
    return line


def _series(history: Sequence[Mapping[str, Any]], axis, value,
            breaks: Sequence[int] = ()) -> dict[int, tuple[list, list]]:
    """Segment id -> (x, y) of ``value(row)`` over the versions on the axis; a NaN is put
    between two points on either side of a version in ``breaks`` (a re-baseline), so
    lines do not join values measured against different baselines."""
    out: dict[int, tuple[list, list]] = {}
    last_version: dict[int, int] = {}
    for h in history:
        x = axis.of(h["version"])
        y = value(h)
        if x is None or y is None or h.get("event") and h.get("weight") == 0.0:
            continue
        sid = int(h["segment"])
        xs, ys = out.setdefault(sid, ([], []))
        prev = last_version.get(sid)
        if prev is not None and any(prev <= b < h["version"] for b in breaks):
            xs.append(math.nan)
            ys.append(math.nan)
        xs.append(x)
        ys.append(float(y))
        last_version[sid] = h["version"]
    return out


def _no_history(title: str, ylabel: str, axis) -> Figure:
    return message_figure(title, "no model yet: the warm-up has not finished", ylabel,
                          axis.label if axis is not None else "")


def weights_figure(history: Sequence[Mapping[str, Any]], axis, events=(),
                   view=None, names=None) -> Figure:
    title = "Segment weights"
    if not any(axis.of(h["version"]) is not None for h in history):
        return _no_history(title, "weight (share of rows)", axis)
    fig = Figure(figsize=(9, 3.8), layout="constrained")
    ax = fig.add_subplot()
    for sid, (xs, ys) in sorted(_series(history, axis, lambda h: h["weight"]).items()):
        _segment_line(ax, axis, sid, xs, ys, names)
    _mark_events(ax, axis, events)
    ax.set_title(title)
    ax.set_ylabel("weight (share of rows)")
    ax.set_ylim(0, None)
    _finish_axis(ax, axis, view, bottom=True)
    ax.grid(alpha=0.3)
    ax.legend(loc="center left", bbox_to_anchor=(1.0, 0.5), fontsize="small")
    return fig


def means_figure(history: Sequence[Mapping[str, Any]], features: Sequence[str],
                 units: Mapping[str, str], baseline: Mapping[int, tuple] | None = None,
                 axis=None, events=(), view=None, names=None,
                 centres: Mapping[str, str] | None = None) -> Figure:
    """One panel per feature: each segment's mean, its baseline mean ± 1 sd shaded.

    ``baseline``: segment id -> (means, sds) in data units, per feature. ``centres``:
    features drawn by another centre (``"median"`` for a transformed feature, whose
    band is its central 68% interval).
    """
    title = "Segment mean per feature (band: baseline mean ± 1 sd)"
    if centres:
        title = ("Segment mean (median where transformed) per feature "
                 "(band: baseline mean ± 1 sd, or 68% interval)")
    if not any(axis.of(h["version"]) is not None for h in history):
        return _no_history(title, "mean", axis)
    n = len(features)
    cols = 2 if n > 1 else 1
    rows_n = math.ceil(n / cols)
    fig = Figure(figsize=(10, 2.7 * rows_n + 0.8), layout="constrained")
    axes = fig.subplots(rows_n, cols, squeeze=False, sharex=True)
    for j, feat in enumerate(features):
        ax = axes[j // cols][j % cols]
        for sid, (xs, ys) in sorted(_series(history, axis, lambda h: h["mean"][j]).items()):
            _segment_line(ax, axis, sid, xs, ys, names, linewidth=1.4)
            if baseline and sid in baseline:
                m, s = baseline[sid][0][j], baseline[sid][1][j]
                ax.axhspan(m - s, m + s, color=segment_style(sid)["color"], alpha=0.15,
                           linewidth=0)
        _mark_events(ax, axis, events)
        ax.set_title(feat, fontsize="medium")
        ax.set_ylabel(f"{(centres or {}).get(feat, 'mean')} ({units.get(feat, 'data units')})")
        ax.grid(alpha=0.3)
        _finish_axis(ax, axis, view, bottom=j + cols >= n)
    for k in range(n, rows_n * cols):
        axes[k // cols][k % cols].set_visible(False)
    handles, labels = axes[0][0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside right center", fontsize="small")
    fig.suptitle(title)
    return fig


def _alert_markers(ax, axis, alerts, statistic: str, scale=lambda v: v) -> None:
    """Alerts on ``statistic``: a triangle where one was raised, a circle where it
    cleared, at the alert's last model version and value."""
    for a in alerts:
        if a.get("statistic") != statistic or a.get("value") is None:
            continue
        mv = a.get("model_version")
        x = axis.of(mv.get("last") if isinstance(mv, Mapping) else a.get("version"))
        if x is None:
            continue
        sid = a.get("segment")
        colour = segment_style(sid)["color"] if isinstance(sid, int) else "black"
        cleared = a.get("status") in ("cleared", "cleared")
        (line,) = ax.plot(_xs(axis, [x]), [scale(float(a["value"]))], linestyle="none",
                          marker="o" if cleared else "^", markersize=9,
                          markerfacecolor=colour, markeredgecolor="black", zorder=6)
        line.set_gid("alert:cleared" if cleared else "alert:raised")


def _with_alert_keys(axes, handles: list, labels: list) -> tuple[list, list]:
    """The legend's entries plus one per kind of alert marker drawn on ``axes``."""
    drawn = {line.get_gid() for ax in axes for line in ax.get_lines()}
    for gid, marker, text in (("alert:raised", "^", "alert raised"),
                              ("alert:cleared", "o", "alert cleared")):
        if gid in drawn:
            handles = handles + [Line2D([], [], linestyle="none", marker=marker, markersize=8,
                                        markerfacecolor="white", markeredgecolor="black")]
            labels = labels + [text]
    return handles, labels


def drift_figure(history: Sequence[Mapping[str, Any]], bounds: Mapping[str, float],
                 alerts: Sequence[Mapping[str, Any]], axis=None, events=(),
                 view=None, names=None) -> Figure:
    """One panel per segment drift statistic: each segment's value, the bound dashed,
    alerts marked; lines break at each re-baseline."""
    title = "Segment drift statistics against their bounds"
    breaks = [e["version"] for e in events if e["kind"] == "rebaseline"]
    stats: dict[str, list] = {}
    bounds = dict(bounds)
    for h in history:
        for name, value in (h.get("drift") or {}).items():
            if isinstance(value, dict) and isinstance(value.get("bound"), (int, float)):
                bounds[name] = float(value["bound"])
            stats.setdefault(name, [])
    if not stats:
        return message_figure(title, "no drift statistics recorded yet", "statistic value",
                              axis.label)

    def getter(name):
        def value(h):
            v = (h.get("drift") or {}).get(name)
            v = v.get("value") if isinstance(v, dict) else v
            return v if isinstance(v, (int, float)) and not isinstance(v, bool) else None
        return value

    statistics = sorted(stats)
    fig = Figure(figsize=(10, 2.5 * len(statistics) + 0.8), layout="constrained")
    axes = fig.subplots(len(statistics), 1, squeeze=False, sharex=True)
    for ax, name in zip(axes[:, 0], statistics):
        for sid, (xs, ys) in sorted(_series(history, axis, getter(name), breaks).items()):
            _segment_line(ax, axis, sid, xs, ys, names, linewidth=1.3)
        bound = bounds.get(name)
        if bound is not None:
            ax.axhline(bound, color="black", linestyle="--", linewidth=1, label="bound")
        _alert_markers(ax, axis, alerts, name)
        _mark_events(ax, axis, events)
        ax.set_title(name, fontsize="medium")
        ax.set_ylabel(f"{name} ({_STAT_UNITS.get(name, 'statistic units')})")
        ax.grid(alpha=0.3)
        _finish_axis(ax, axis, view, bottom=ax is axes[-1, 0])
    handles, labels = _with_alert_keys(axes[:, 0], *axes[0][0].get_legend_handles_labels())
    fig.legend(handles, labels, loc="outside right center", fontsize="small")
    fig.suptitle(title)
    return fig


def fit_figure(points: Sequence[tuple[int, float]], bound: float | None,
               alerts: Sequence[Mapping[str, Any]], axis=None, events=(),
               view=None) -> Figure:
    """``fit_drop`` of each input: the baseline's mean log-density per row minus the
    input's (nats per row; above the dashed bound the model no longer fits the data).

    points : (model version, fit_drop) of each input with a baseline in force
    """
    title = "Fit of the whole model: fit_drop per input (baseline minus input, nats per row)"
    shown = [(axis.of(v), y) for v, y in points if axis.of(v) is not None]
    if not shown:
        return message_figure(title, "no fit_drop yet: no baseline, or no labels files to read",
                              "fit_drop (nats per row)", axis.label)
    breaks = [e["version"] for e in events if e["kind"] == "rebaseline"]
    xs, ys, prev = [], [], None
    for (v, y), (x, _) in zip([p for p in points if axis.of(p[0]) is not None], shown):
        if prev is not None and any(prev <= b < v for b in breaks):
            xs.append(math.nan)
            ys.append(math.nan)
        xs.append(x)
        ys.append(y)
        prev = v
    fig = Figure(figsize=(10, 3.6), layout="constrained")
    ax = fig.add_subplot()
    (line,) = ax.plot(_xs(axis, xs), ys, color="#0072B2", linestyle="-", marker="o",
                      markersize=4, markevery=max(1, len(xs) // 12), label="fit_drop")
    line.set_gid("fit_drop")
    if bound is not None:
        ax.axhline(bound, color="black", linestyle="--", linewidth=1, label="bound")
    ax.axhline(0.0, color="#777777", linewidth=0.8)
    _alert_markers(ax, axis, alerts, "fit_drop")
    _mark_events(ax, axis, events)
    ax.set_title(title, fontsize="medium")
    ax.set_ylabel("fit_drop (nats per row)")
    ax.grid(alpha=0.3)
    _finish_axis(ax, axis, view, bottom=True)
    handles, labels = _with_alert_keys([ax], *ax.get_legend_handles_labels())
    ax.legend(handles, labels, loc="center left", bbox_to_anchor=(1.0, 0.5), fontsize="small")
    return fig


_STAT_UNITS = {
    "mean_shift": "baseline sds",
    "batch_mean_shift": "baseline sds",
    "feature_shift": "baseline sds",
    "spread_change": "log ratio",
    "spread_ratio": "ratio",
    "hellinger": "distance, 0-1",
    "weight_change": "share of rows",
    "batch_weight_change": "share of rows",
    "fit_drop": "nats per row",
}


def _ellipse(ax, mean2, cov2, color, n_sd=2.0, **kw) -> None:
    vals, vecs = np.linalg.eigh(cov2)
    vals = np.clip(vals, 0.0, None)
    angle = math.degrees(math.atan2(vecs[1, 1], vecs[0, 1]))
    ax.add_patch(Ellipse(mean2, 2 * n_sd * math.sqrt(vals[1]), 2 * n_sd * math.sqrt(vals[0]),
                         angle=angle, fill=False, edgecolor=color, linewidth=1.8, **kw))


def pca_figure(X: np.ndarray, segments: np.ndarray, means: Mapping[int, np.ndarray],
               covariances: Mapping[int, np.ndarray], features: Sequence[str]) -> Figure:
    """Rows in the two most informative directions (PCA of the standardised sample),
    coloured by segment, with each current segment's 2-sd ellipse projected there.

    X : ndarray of shape (n_rows, n_features), data units
    segments : ndarray of shape (n_rows,), segment id per row (-1: none)
    means, covariances : segment id -> ndarray (n_features,), (n_features, n_features)
    """
    title = "Recent rows in the two main directions (PCA), coloured by segment"
    if X.shape[0] < 3:
        return message_figure(title, "no recent rows to show (inputs moved away or no model "
                              "yet)", "PC2 (standardised units)", "PC1 (standardised units)")
    center = X.mean(axis=0)
    scale = X.std(axis=0)
    scale[scale == 0] = 1.0
    Z = (X - center) / scale
    if Z.shape[1] == 1:
        Z = np.column_stack([Z, np.zeros(len(Z))])
        components = np.array([[1.0], [0.0]])
        share = np.array([1.0, 0.0])
    else:
        _, s, vt = np.linalg.svd(Z - Z.mean(axis=0), full_matrices=False)
        components = vt[:2]
        share = s[:2] ** 2 / np.sum(s ** 2)
    P = Z @ components.T if components.shape[1] == Z.shape[1] else Z
    fig = Figure(figsize=(9, 6), layout="constrained")
    ax = fig.add_subplot()
    for sid in sorted(set(np.unique(segments).tolist())):
        mask = segments == sid
        st = segment_style(sid) if sid >= 0 else {"color": "#999999", "marker": "."}
        ax.scatter(P[mask, 0], P[mask, 1], s=8, alpha=0.45, color=st["color"],
                   marker=st["marker"], linewidths=0,
                   label=f"segment {sid}" if sid >= 0 else "no segment")
    for sid in sorted(means):
        m = (np.asarray(means[sid]) - center) / scale @ components.T
        C = np.asarray(covariances[sid]) / np.outer(scale, scale)
        _ellipse(ax, m, components @ C @ components.T, segment_style(sid)["color"])
        ax.annotate(str(sid), m, ha="center", va="center", fontweight="bold")
    ax.set_title(title)
    ax.set_xlabel(f"PC1 (standardised units; {share[0]:.0%} of variance)")
    ax.set_ylabel(f"PC2 (standardised units; {share[1]:.0%} of variance)")
    ax.grid(alpha=0.3)
    ax.legend(loc="center left", bbox_to_anchor=(1.0, 0.5), fontsize="small",
              markerscale=2)
    ax.set_aspect("equal", adjustable="datalim")
    return fig
