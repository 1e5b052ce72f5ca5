"""Drift alerts: payloads with deterministic ids and explanations in the data's units.

:func:`drift_event_alert` turns a raised or cleared event of
:func:`shoal.core.drift.evaluate_bounds` into the alert payload (README, "Alert
payload"): the same cause (baseline, segment, statistic, first crossing window) gives
the same id, a raised alert stays open in the drift state until it clears, and each
payload explains itself: which features moved, by how much in baseline sds, for a
transformed feature its median in the data's units, Hotelling's ``T^2`` and p-value
for a mean shift, the sds for a spread change, the missing shares, or for the whole
model's fit the unusual rows and the segment most of them are labelled.
"""
from __future__ import annotations

import hashlib
import json
import math

import numpy as np

from shoal.core.distances import hotelling_t2_pvalue
from shoal.core.drift import WHOLE_MODEL, Baseline, explain
from shoal.daemon.model.transforming import moves_in_data_units
from shoal.daemon.segments.missing_drift import missing_note
from shoal.daemon.segments.window_sums import files_of, span

__all__ = ["PAYLOAD_SCHEMA_VERSION", "STATISTIC_UNITS", "alert_id", "drift_event_alert",
           "drift_summary", "finite_or_none", "shown", "shown_noise"]

# Version of the alert payload's fields (README, "Alert payload"); a change to a field's
# name or meaning bumps it, so a receiver can tell which fields to expect.
PAYLOAD_SCHEMA_VERSION = 1

STATISTIC_UNITS = {
    "missing_share": "share of rows",
    "mean_shift": "baseline sds",
    "spread_ratio": "ratio of sds",
    "weight_change": "share of rows",
    "fit_drop": "nats per row",
    "feature_shift": "baseline sds",
}
_TOP_FEATURES = 3


def alert_id(baseline_number: int, segment, statistic: str, first_window: int) -> str:
    """The same cause (baseline, segment, statistic, first crossing window) -> the same id."""
    cause = json.dumps([int(baseline_number), str(segment), statistic, int(first_window)])
    return "drift-" + hashlib.sha256(cause.encode()).hexdigest()[:20]


def finite_or_none(x) -> float | None:
    """``x`` as a float, None when not finite (JSON has no inf or nan)."""
    x = float(x)
    return x if math.isfinite(x) else None


def _fmt(x: float) -> str:
    return f"{x:.4g}"


def _moves(moved) -> str:
    return ", ".join(f"{m['feature']} {_fmt(m['baseline_mean'])} -> {_fmt(m['window_mean'])} "
                     + (f"(median, {m['shift_sd']:+.2f} sd of {m['transform']})"
                        if m.get("centre") == "median" else f"({m['shift_sd']:+.2f} sd)")
                     for m in moved[:_TOP_FEATURES])


def shown(stat, v):
    """A statistic as users read it (spread_ratio is evaluated on its log)."""
    if v is None:
        return math.nan
    return math.exp(v) if stat == "spread_ratio" else v


def shown_noise(stat, v):
    """A noise level as users read it (on the ratio's scale for spread_ratio)."""
    return math.exp(v) if stat == "spread_ratio" and v is not None else v


def drift_summary(keyed, bounds: dict) -> dict[str, dict]:
    """Per segment id (str): each statistic's value, noise and bound as shown, from a
    window's keyed ``(values, noise, detail)`` and the bounds in force."""
    values, noise, _ = keyed
    out: dict[str, dict] = {}
    for (seg, stat), v in values.items():
        bound = bounds.get((seg, stat), bounds.get(stat))
        out.setdefault(str(seg), {})[stat] = {
            "value": finite_or_none(shown(stat, v)),
            "noise": finite_or_none(shown_noise(stat, noise[(seg, stat)])),
            "bound": None if bound is None else finite_or_none(shown(stat, bound))}
    return out


def drift_event_alert(watch, e: dict, detail: dict, ref: Baseline, info: dict,
                      recent: list) -> None:
    """Turn a raised or cleared event of ``watch`` (an InputWatch) into its alert payload,
    kept open or closed in the watch's state; ``recent`` are the records of the windows
    up to the evaluated one (``info``'s)."""
    st = watch.state
    seg, stat = e["segment"], e["statistic"]
    key = f"{seg}|{stat}"
    if e["status"] == "raised":
        windows = [w for w in recent if w["index"] >= e["first_at"]]
        payload = {
            "schema_version": PAYLOAD_SCHEMA_VERSION,
            "id": alert_id(st["baseline_number"], seg, stat, e["first_at"]),
            "kind": "drift",
            "status": "raised",
            "severity": _severity(watch, stat, e["value"], e["bound"]),
            "segment": seg if seg == WHOLE_MODEL else int(seg),
            "statistic": stat,
            "unit": STATISTIC_UNITS[stat.split("[")[0]],
            "value": finite_or_none(shown(stat, e["value"])),
            "bound": finite_or_none(shown(stat, e["bound"])),
            "noise": finite_or_none(shown_noise(stat, e["noise"])),
            "model_version": {"first": min(w["versions"][0] for w in windows),
                              "last": watch.version},
            "rows": {"first": windows[0]["rows"][0], "last": info["rows"][1]},
            "time": span([w["time"] for w in windows]),
            "inputs": files_of(windows),
            "windows": {"first": e["first_at"], "last": e["at"],
                        "rows_each": watch.window_rows},
            "baseline": {k: v for k, v in (st["baseline_info"] or {}).items()
                          if k in ("number", "model_version", "row")},
            "explanation": _explain(watch, seg, stat, detail, ref),
        }
        st["open"][key] = {"payload": payload}
        watch.emit(payload)
    else:
        opened = st["open"].pop(key, None)
        base = opened["payload"] if opened else {
            "schema_version": PAYLOAD_SCHEMA_VERSION,
            "id": alert_id(st["baseline_number"], seg, stat, e["first_at"] or e["at"]),
            "kind": "drift", "segment": seg, "statistic": stat,
            "unit": STATISTIC_UNITS[stat.split("[")[0]],
            "model_version": {"first": watch.version}, "rows": {"first": info["rows"][0]},
            "severity": "major", "baseline": None}
        windows = recent[-watch.drift.resolve_persist:]
        payload = dict(base)
        payload.update({
            "status": "cleared",
            "value": finite_or_none(shown(stat, e["value"])),
            "bound": finite_or_none(shown(stat, e["bound"])),
            "noise": finite_or_none(shown_noise(stat, e["noise"])),
            "peak": finite_or_none(shown(stat, e["peak"])),
            "model_version": {"first": base["model_version"]["first"], "last": watch.version},
            "rows": {"first": base["rows"]["first"], "last": info["rows"][1]},
            "time": span(([[base["time"]["first"], base["time"]["last"]]]
                           if base.get("time") else []) + [w["time"] for w in windows]),
            "inputs": files_of(windows),
            "explanation": _explain(watch, seg, stat, detail, ref),
        })
        st["cool"][key] = e["at"] + watch.drift.cool_down_windows
        watch.emit(payload)


def _severity(watch, stat, value, bound) -> str:
    """X.733 perceived severity: ``critical`` at ``critical_multiple`` times the bound,
    ``major`` past the bound (segment events are ``warning``)."""
    return "critical" if value >= watch.drift.critical_multiple * bound else "major"

def _explain(watch, seg, stat, detail, ref: Baseline) -> dict:
    names = watch.monitor.features
    if seg == WHOLE_MODEL:
        return _explain_fit(watch, detail.get(WHOLE_MODEL), ref)
    info = detail.get(seg, {})
    if stat == "missing_share":
        return _explain_missing(watch, seg, info)
    if "mean" not in info:
        share = info.get("share", 0.0)
        return {"summary": f"segment {seg} took {share:.1%} of the window's rows "
                           f"(baseline weight {info.get('baseline_weight', 0.0):.1%}) "
                           "and had no rows to compare",
                "share": share, "baseline_weight": info.get("baseline_weight")}
    moved = moves_in_data_units(explain(ref, seg, info["mean"], feature_names=names),
                                watch.transforms)
    out = {"features": moved, "share": info["share"],
           "baseline_weight": info["baseline_weight"], "effective_rows": info["n_eff"]}
    if stat == "mean_shift":   # T^2 = n_eff d^2 against chi-square(D) (scipy.stats.chi2)
        out["hotelling_t2"] = info["t2"]
        out["p_value"] = float(hotelling_t2_pvalue(info["t2"], len(names)))
    if stat == "spread_ratio":
        k = ref.index_of(seg)
        ratio = np.sqrt(np.maximum(np.diag(info["cov"]), 0.0) /
                        np.diag(ref.covariances[k]))
        order = sorted(range(len(names)), key=lambda j: (-abs(math.log(max(ratio[j], 1e-300))), j))
        out["spreads"] = [{"feature": names[j],
                           "baseline_sd": float(math.sqrt(ref.covariances[k][j, j])),
                           "window_sd": float(math.sqrt(max(info["cov"][j, j], 0.0))),
                           "ratio": float(ratio[j])} for j in order]
        top = ", ".join(f"{s['feature']} sd {_fmt(s['baseline_sd'])} -> "
                        f"{_fmt(s['window_sd'])} (x{s['ratio']:.2f})"
                        for s in out["spreads"][:_TOP_FEATURES])
        out["summary"] = f"segment {seg} spread changed: {top}"
    elif stat == "weight_change":
        out["summary"] = (f"segment {seg} took {info['share']:.1%} of the rows against a "
                          f"baseline weight of {info['baseline_weight']:.1%}; "
                          + _moves(moved))
    else:
        out["summary"] = f"segment {seg} moved: " + _moves(moved)
    note = missing_note(info, names)
    if note:
        out["summary"] += f"; {note}"
    return out

def _explain_missing(watch, seg, info) -> dict:
    names = watch.monitor.features
    m = info.get("missing") or {}
    if not m:
        return {"summary": f"segment {seg} had no rows to compare"}
    f = names[m["feature"]]
    if m["share"] == m["baseline_share"]:
        summary = (f"segment {seg}: no feature missing from a share of its rows other "
                   "than the baseline's")
    else:
        summary = (f"feature {f} missing from {m['share']:.1%} of segment {seg}'s rows "
                   f"(baseline {m['baseline_share']:.1%})")
    return {"summary": summary,
            "feature": f, "share": m["share"], "baseline_share": m["baseline_share"],
            "shares": {names[j]: s for j, s in enumerate(m["shares"])},
            "effective_rows": info.get("n_eff")}

def _explain_fit(watch, info, ref: Baseline) -> dict:
    if not info:
        return {"summary": "no rows"}
    out = {"mean_log_density": info["mean_log_density"],
           "baseline_log_density": float(ref.log_density),
           "unusual_rows": info["unusual"], "rows": info["n"],
           "expected_unusual_share": watch.monitor.settings.output.unusual_quantile}
    head = (f"mean log-density {_fmt(info['mean_log_density'])} against "
            f"{_fmt(ref.log_density)} nats/row at the baseline; "
            f"{info['unusual'] / info['n']:.1%} of rows unusual (expected "
            f"{watch.monitor.settings.output.unusual_quantile:.1%})")
    by_seg = info["unusual_by_segment"]
    if info["unusual"] and by_seg:
        near = max(by_seg, key=lambda s: (by_seg[s], -int(s)))
        if int(near) in set(ref.ids.tolist()):
            moved = moves_in_data_units(explain(ref, int(near), info["unusual_mean"],
                                                feature_names=watch.monitor.features),
                                        watch.transforms)
            out.update(nearest_segment=int(near), features=moved)
            head += (f"; most are labelled segment {near}, from whose baseline they "
                     f"differ: " + _moves(moved))
    out["summary"] = head
    return out
