"""``shoal suggest-transforms``: a transform per feature proposed from a sample file.

The sample is read as an input is (the configured features, Parquet or CSV, the same
checks); for each feature the rule below picks the simplest transform that makes the
values nearly symmetric, and says why (skewness before and after, share of zeros):

* ``|skewness| < 0.5``: ``none`` (a common rule of thumb for "roughly symmetric");
* values strictly between 0 and 1: ``logit``;
* positive values: ``log``; with zeros and nothing negative: ``log1p``;
* otherwise, or when that leaves the values still clearly skewed (``|skewness| >= 1``;
  between 0.5 and 1 counts as moderate, common practice) and Yeo-Johnson does better:
  ``yeo-johnson`` (its parameter is fitted again on the warm-up rows, not taken from
  the sample);
* ``none`` when no transform lowers ``|skewness|``.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from shoal.config import Settings
from shoal.core import FeatureTransforms
from shoal.core.transforms import fit_yeo_johnson, skewness, yeo_johnson
from shoal.daemon.errors import InputRejected, UsageError
from shoal.daemon.intake.gate import input_kind
from shoal.daemon.files.readers import iter_frames

__all__ = ["suggest_transforms", "format_suggestions", "add_transform_commands",
           "SYMMETRIC_SKEW", "SAMPLE_ROWS"]

SYMMETRIC_SKEW = 0.5     # |skewness| below this counts as symmetric (common practice)
MODERATE_SKEW = 1.0      # below this a simpler transform is kept (moderate skew)
SAMPLE_ROWS = 200_000    # rows of the file looked at (the first ones)


def _skew_after(kind: str, x: np.ndarray) -> float:
    if kind == "yeo-johnson":
        return skewness(yeo_johnson(x, fit_yeo_johnson(x)))
    Y, inside = FeatureTransforms.from_kinds([kind]).forward(x[:, None])
    return skewness(Y[inside, 0])


def suggest_one(x: np.ndarray) -> dict:
    """The transform proposed for one feature's finite values, with the reason.

    Returns ``{"transform", "skewness", "skewness_after", "zeros", "rows", "reason"}``.
    """
    x = np.asarray(x, dtype=np.float64)
    x = x[np.isfinite(x)]
    out = {"rows": int(x.size), "zeros": float(np.mean(x == 0.0)) if x.size else 0.0}
    if x.size < 3 or np.ptp(x) == 0.0:
        out.update(transform="none", skewness=0.0, skewness_after=0.0,
                   reason="too few distinct values to judge")
        return out
    before = skewness(x)
    out["skewness"] = before
    if abs(before) < SYMMETRIC_SKEW:
        out.update(transform="none", skewness_after=before,
                   reason=f"skewness {before:.2f}: already roughly symmetric")
        return out
    lo, hi = float(np.min(x)), float(np.max(x))
    if lo > 0.0 and hi < 1.0:
        kind = "logit"
    elif lo > 0.0:
        kind = "log"
    elif lo == 0.0:
        kind = "log1p"
    else:
        kind = "yeo-johnson"
    after = _skew_after(kind, x)
    if abs(after) >= MODERATE_SKEW and kind != "yeo-johnson":
        yj = _skew_after("yeo-johnson", x)
        if abs(yj) < abs(after):
            kind, after = "yeo-johnson", yj
    if abs(after) >= abs(before):
        out.update(transform="none", skewness_after=before,
                   reason=f"skewness {before:.2f}; no transform makes it more symmetric")
        return out
    zeros = f"{out['zeros']:.1%} zeros" if out["zeros"] else "no zeros"
    sign = "negative values" if lo < 0 else ("values in (0, 1)" if kind == "logit" else zeros)
    out.update(transform=kind, skewness_after=after,
               reason=f"skewness {before:.2f} -> {after:.2f}; {sign}")
    return out


def suggest_transforms(settings: Settings, path: Path, rows: int = SAMPLE_ROWS) -> dict:
    """Feature name -> :func:`suggest_one` of the first ``rows`` rows of ``path``."""
    kind = input_kind(path.name)
    if kind is None:
        raise UsageError(f"{path}: expected a name ending in .csv, .csv.gz, .parquet or .pq")
    parts, n = [], 0
    with open(path, "rb") as f:
        for frame in iter_frames(f, kind, settings):
            parts.append(frame.features)
            n += frame.n_rows
            if n >= rows:
                break
    X = np.concatenate(parts)[:rows]
    return {name: suggest_one(X[:, j]) for j, name in enumerate(settings.features)}


def format_suggestions(suggestions: dict, source: str) -> str:
    """A YAML snippet for the config: ``transforms:`` with the reason as comments."""
    lines = [f"# proposed by shoal suggest-transforms from {source}",
             "transforms:"]
    width = max(len(name) for name in suggestions) + 2 + max(
        len(s["transform"]) for s in suggestions.values())
    for name, s in suggestions.items():
        entry = f"{name}: {s['transform']}"
        lines.append(f"  {entry.ljust(width)}  # {s['reason']}")
    return "\n".join(lines) + "\n"


def _cmd_suggest(args) -> int:
    from shoal.config import load_config

    settings = load_config(args.config)
    path = Path(args.file)
    if not path.exists():
        raise UsageError(f"no such file: {path}")
    try:
        suggestions = suggest_transforms(settings, path, args.rows)
    except InputRejected as exc:
        raise UsageError(f"{path} cannot be read as a sample: {exc}") from exc
    print(format_suggestions(suggestions, path.name), end="")
    return 0


def add_transform_commands(cmd, with_config) -> None:
    """Register ``suggest-transforms`` on the ``shoal`` command."""
    sp = with_config(cmd("suggest-transforms", "propose a transform per feature from a "
                         "sample file (Parquet or CSV), as a YAML snippet with the reasons",
                         _cmd_suggest))
    sp.add_argument("file", metavar="FILE")
    sp.add_argument("--rows", type=int, default=SAMPLE_ROWS, metavar="N",
                    help=f"rows of the file looked at (default {SAMPLE_ROWS:,})")
