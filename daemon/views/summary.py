"""The current segments, as data and as a text table (``shoal segments``)."""
from __future__ import annotations

import time
from typing import Any

from shoal.config import Settings, shown
from shoal.core import Mixture
from shoal.daemon.segments.segment_names import segment_names
from shoal.daemon.model.contract import settings_of_model
from shoal.daemon.state.store import StateStore
from shoal.daemon.model.transforming import feature_centres, from_meta

__all__ = ["segment_summary", "format_segments", "format_differences"]


def segment_summary(store: StateStore, settings: Settings, now: float | None = None,
                    include_gone: bool = False) -> dict:
    """Model version, warm-up progress and one record per current segment; with
    ``include_gone``, also the segments that retired or merged away (``gone``). The
    segments are shown under the stored model's feature names; ``config_differs`` lists
    the keys where the config differs from the stored model's contract."""
    now = time.time() if now is None else now
    settings, differs = settings_of_model(store, settings)
    cp = store.latest_checkpoint()
    out: dict[str, Any] = {"model_version": store.model_version,
                           "features": list(settings.features), "segments": [],
                           "config_differs": differs}
    if cp is None:   # no model yet: the inputs taken so far only fill the warm-up
        buffered = store.warmup_rows()
        out["warmup"] = {"rows": 0 if buffered is None else int(len(buffered)),
                         "needed": settings.warmup_rows, "inputs": store.model_version}
        out["model_version"] = None
        return out
    m = Mixture.from_state(cp.arrays, cp.meta)
    names = segment_names(store.db)
    means, stds = m.data_means(), m.data_stds()
    transforms = from_meta(cp.meta, m.n_features)
    rows = cp.extra.get("segment_rows", {})
    born = cp.extra.get("segment_born", {})
    out["checkpoint_version"] = cp.version
    out["rows_learned"] = int(m.n_rows)
    for k, sid in enumerate(m.ids.tolist()):
        b = born.get(str(sid), {})
        record = {
            "id": int(sid),
            "name": names.get(int(sid)),
            "weight": float(m.weights[k]),
            "rows": int(rows.get(str(sid), 0)),
            "mean": {f: float(v) for f, v in zip(settings.features, means[k])},
            "spread": {f: float(v) for f, v in zip(settings.features, stds[k])},
            "born_version": b.get("version"),
            "age_versions": None if b.get("version") is None else cp.version - b["version"],
            "age_seconds": None if b.get("time") is None else round(now - b["time"], 1),
        }
        _in_data_units(record, feature_centres(transforms, settings.features, means[k],
                                                stds[k]))
        out["segments"].append(record)
    if include_gone:
        out["gone"] = _gone_segments(store, settings, set(m.ids.tolist()), born)
        for g in out["gone"]:
            g["name"] = names.get(g["id"])
    return out


def _in_data_units(record: dict, centres: dict) -> None:
    """A transformed feature's ``mean`` is its median in the data's units (``median``),
    its ``spread`` None and ``interval`` the central 68% interval (a segment is
    Gaussian in the model's units, not in the data's)."""
    if not centres:
        return
    record["median"] = {f: c["median"] for f, c in centres.items()}
    record["interval"] = {f: c["interval"] for f, c in centres.items()}
    for f, c in centres.items():
        record["mean"][f] = c["median"]
        record["spread"][f] = None


def _cell(s: dict, f: str) -> str:
    """One feature of a segment: ``mean±sd``, or ``median [low, high]`` if transformed."""
    if f in s.get("interval", {}):
        low, high = s["interval"][f]
        return f"{_num(s['median'][f])} [{_num(low)}, {_num(high)}]"
    return f"{_num(s['mean'][f])}±{_num(s['spread'][f])}"


def _gone_segments(store: StateStore, settings: Settings, current: set, born: dict) -> list:
    """Segments that left the model: when, how, and their last mean and spread."""
    gone = {}
    for h in store.segment_events():
        if h["segment"] in current or not h["event"].startswith(("retired", "merged into")):
            continue
        gone[h["segment"]] = {
            "id": int(h["segment"]), "ended": h["event"], "ended_version": h["version"],
            "born_version": born.get(str(h["segment"]), {}).get("version"),
            "mean": {f: float(v) for f, v in zip(settings.features, h["mean"])},
            "spread": {f: float(v) for f, v in zip(settings.features, h["spread"])}}
    return [gone[k] for k in sorted(gone)]


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
