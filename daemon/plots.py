"""The pictures of ``shoal report`` and the status page, drawn with matplotlib (Agg).

Each function takes plain data (the segment history, alerts, a sample of rows)
and returns PNG bytes. Figures are made with the object API
(``matplotlib.figure.Figure``), never ``pyplot``, so drawing is safe off the
main thread and leaves no global state. Colours are the Okabe-Ito palette,
chosen to stay distinguishable with the common colour-vision deficiencies
(Okabe & Ito 2008, "Color Universal Design"); line styles and markers vary
too, so no plot relies on colour alone. Every plot has a title and axis labels
with units.
"""
from __future__ import annotations

import datetime as _dt
import io
import math
from typing import Any, Mapping, Sequence

import matplotlib

matplotlib.use("Agg", force=False)
import matplotlib.dates as mdates  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.patches import Ellipse  # noqa: E402

__all__ = ["PALETTE", "segment_style", "weights_png", "means_png", "drift_png", "pca_png",
           "message_png"]

# Okabe-Ito, without black first (black is used for bounds and annotations).
PALETTE = ("#E69F00", "#56B4E9", "#009E73", "#0072B2", "#D55E00", "#CC79A7", "#F0E442",
           "#000000")
_LINESTYLES = ("-", "--", "-.", ":")
_MARKERS = ("o", "s", "^", "D", "v", "P", "X", "*")
_DPI = 100


def segment_style(segment_id: int) -> dict:
    """Colour, line style and marker of a segment id (stable across plots)."""
    i = int(segment_id)
    return {"color": PALETTE[i % len(PALETTE)],
            "linestyle": _LINESTYLES[(i // len(PALETTE)) % len(_LINESTYLES)],
            "marker": _MARKERS[i % len(_MARKERS)]}


def _png(fig: Figure) -> bytes:
    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=_DPI)
    return buf.getvalue()


def _times(values: Sequence[float]) -> list[_dt.datetime]:
    return [_dt.datetime.fromtimestamp(v, _dt.timezone.utc) for v in values]


def _time_axis(ax) -> None:
    """Concise UTC ticks; the date goes in the axis label when it is one day (no offset
    text, which would collide with the label)."""
    locator = mdates.AutoDateLocator(minticks=3, maxticks=7)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator, show_offset=False))
    lo, hi = (mdates.num2date(x, tz=_dt.timezone.utc) for x in ax.get_xlim())
    day = f", {lo:%Y-%m-%d}" if lo.date() == hi.date() else ""
    ax.set_xlabel(f"time of commit (UTC{day})")


def message_png(title: str, message: str, ylabel: str = "value",
                xlabel: str = "time of commit (UTC)") -> bytes:
    """A titled, labelled, empty plot that says why there is nothing to draw."""
    fig = Figure(figsize=(9, 2.6), layout="constrained")
    ax = fig.add_subplot()
    ax.set_title(title)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    ax.text(0.5, 0.5, message, ha="center", va="center", transform=ax.transAxes)
    ax.set_xticks([])
    ax.set_yticks([])
    return _png(fig)


def _by_segment(history: Sequence[Mapping[str, Any]]) -> dict[int, list[Mapping[str, Any]]]:
    out: dict[int, list] = {}
    for h in history:
        out.setdefault(int(h["segment"]), []).append(h)
    return out


def weights_png(history: Sequence[Mapping[str, Any]]) -> bytes:
    title = "Segment weights over time"
    if not history:
        return message_png(title, "no model yet: the warm-up has not finished",
                           "weight (share of rows)")
    fig = Figure(figsize=(9, 3.6), layout="constrained")
    ax = fig.add_subplot()
    for sid, rows in sorted(_by_segment(history).items()):
        st = segment_style(sid)
        ax.plot(_times([r["created"] for r in rows]), [r["weight"] for r in rows],
                color=st["color"], linestyle=st["linestyle"], marker=st["marker"],
                markersize=3, label=f"segment {sid}")
    ax.set_title(title)
    ax.set_ylabel("weight (share of rows)")
    ax.set_ylim(0, None)
    _time_axis(ax)
    ax.grid(alpha=0.3)
    ax.legend(loc="center left", bbox_to_anchor=(1.0, 0.5), fontsize="small")
    return _png(fig)


def means_png(history: Sequence[Mapping[str, Any]], features: Sequence[str],
              units: Mapping[str, str], baseline: Mapping[int, tuple] | None = None,
              centres: Mapping[str, str] | None = None) -> bytes:
    """One panel per feature: each segment's mean over time, its baseline mean ± 1 sd shaded.

    ``baseline``: segment id -> (means, sds) in data units, per feature. ``centres``:
    features drawn by another centre (``"median"`` for a transformed feature, whose
    band is its central 68% interval).
    """
    title = "Segment mean per feature over time (band: baseline mean ± 1 sd)"
    if centres:
        title = ("Segment mean (median where transformed) per feature over time "
                 "(band: baseline mean ± 1 sd, or 68% interval)")
    if not history:
        return message_png(title, "no model yet: the warm-up has not finished", "mean")
    n = len(features)
    cols = 2 if n > 1 else 1
    rows_n = math.ceil(n / cols)
    fig = Figure(figsize=(10, 2.6 * rows_n + 0.6), layout="constrained")
    axes = fig.subplots(rows_n, cols, squeeze=False, sharex=True)
    by_seg = _by_segment(history)
    for j, feat in enumerate(features):
        ax = axes[j // cols][j % cols]
        for sid, rows in sorted(by_seg.items()):
            st = segment_style(sid)
            t = _times([r["created"] for r in rows])
            ax.plot(t, [r["mean"][j] for r in rows], color=st["color"],
                    linestyle=st["linestyle"], linewidth=1.4, label=f"segment {sid}")
            if baseline and sid in baseline:
                m, s = baseline[sid][0][j], baseline[sid][1][j]
                ax.axhspan(m - s, m + s, color=st["color"], alpha=0.15, linewidth=0)
        ax.set_title(feat, fontsize="medium")
        ax.set_ylabel(f"{(centres or {}).get(feat, 'mean')} ({units.get(feat, 'data units')})")
        ax.grid(alpha=0.3)
        _time_axis(ax)
        if j + cols < n:  # shared time axis: its label only under the lowest panels
            ax.set_xlabel("")
    for k in range(n, rows_n * cols):
        axes[k // cols][k % cols].set_visible(False)
    handles, labels = axes[0][0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside right center", fontsize="small")
    fig.suptitle(title)
    return _png(fig)


def drift_png(history: Sequence[Mapping[str, Any]], bounds: Mapping[str, float],
              alerts: Sequence[Mapping[str, Any]]) -> bytes:
    """One panel per drift statistic: each segment's value over time, the bound dashed,
    alerts marked with a triangle where they were raised (a circle where they were cleared)."""
    title = "Drift statistics against their bounds (markers: alerts)"
    stats: dict[str, dict[int, list]] = {}
    bounds = dict(bounds)
    for h in history:
        for name, value in (h.get("drift") or {}).items():
            if isinstance(value, dict):  # {"value", "noise", "bound"}: the bound in force
                if isinstance(value.get("bound"), (int, float)):
                    bounds[name] = float(value["bound"])
                value = value.get("value")
            if isinstance(value, (int, float)) and not isinstance(value, bool):
                stats.setdefault(name, {}).setdefault(int(h["segment"]), []).append(
                    (h["created"], float(value), h["version"]))
    if not stats:
        return message_png(title, "no drift statistics recorded yet", "statistic value")
    names = sorted(stats)
    fig = Figure(figsize=(10, 2.4 * len(names) + 0.6), layout="constrained")
    axes = fig.subplots(len(names), 1, squeeze=False, sharex=True)
    version_time = {h["version"]: h["created"] for h in history}
    for ax, name in zip(axes[:, 0], names):
        for sid, pts in sorted(stats[name].items()):
            st = segment_style(sid)
            ax.plot(_times([p[0] for p in pts]), [p[1] for p in pts], color=st["color"],
                    linestyle=st["linestyle"], linewidth=1.3, label=f"segment {sid}")
        bound = bounds.get(name)
        if bound is not None:
            ax.axhline(bound, color="black", linestyle="--", linewidth=1, label="bound")
        for a in alerts:
            if a.get("statistic") != name:
                continue
            mv = a.get("model_version")
            v = mv.get("last") if isinstance(mv, dict) else a.get("version")
            when = version_time.get(v, a.get("created"))
            if when is None or a.get("value") is None:
                continue
            sid = a.get("segment")
            color = segment_style(sid)["color"] if isinstance(sid, int) else "black"
            cleared = a.get("status") == "cleared"
            ax.plot(_times([when]), [float(a["value"])], linestyle="none",
                    marker="o" if cleared else "^", markersize=9, markerfacecolor=color,
                    markeredgecolor="black")
        ax.set_title(name, fontsize="medium")
        ax.set_ylabel(f"{name} ({_STAT_UNITS.get(name, 'statistic units')})")
        ax.grid(alpha=0.3)
        _time_axis(ax)
        if ax is not axes[-1, 0]:
            ax.set_xlabel("")
    handles, labels = axes[0][0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside right center", fontsize="small")
    fig.suptitle(title)
    return _png(fig)


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


def pca_png(X: np.ndarray, segments: np.ndarray, means: Mapping[int, np.ndarray],
            covariances: Mapping[int, np.ndarray], features: Sequence[str]) -> bytes:
    """Rows in the two most informative directions (PCA of the standardised sample),
    coloured by segment, with each current segment's 2-sd ellipse projected there.

    X : ndarray of shape (n_rows, n_features), data units
    segments : ndarray of shape (n_rows,), segment id per row (-1: none)
    means, covariances : segment id -> ndarray (n_features,), (n_features, n_features)
    """
    title = "Recent rows in the two main directions (PCA), coloured by segment"
    if X.shape[0] < 3:
        return message_png(title, "no recent rows to show (inputs moved away or no model yet)",
                           "PC2 (standardised units)", "PC1 (standardised units)")
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
    return _png(fig)
