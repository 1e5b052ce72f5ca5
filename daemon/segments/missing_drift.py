"""Drift windows over rows with missing features, and the missing-share statistic.

A window's per-segment sums (:mod:`shoal.daemon.segments.monitor`) take a row with missing
features as the model's E-step does: its missing coordinates at their conditional mean
under each segment, and the conditional covariance added to the second moments (the
statistics EM with missing data learns from; unbiased under missing-at-random data
when the model fits). Beside them each segment keeps, per feature, the responsibility
mass of its rows that missed the feature (``miss``, and its squares ``miss2``) and the
part of the first moments that was imputed (``imputed``), so that

* a feature's own mean in the window uses only the rows where it was observed, with
  Kish's effective rows of those rows (``feature_shift`` and the explanations;
  :mod:`shoal.core.window_statistics` computes both statistics);
* ``missing_share`` is the share of a segment's rows that missed a feature against the
  baseline's share, the largest over the features; a probe that stops reporting is
  itself news. Its noise is the binomial sd at the effective rows of the window and
  of the baseline.

Complete streams never add these keys, so their state is as before.
"""

from __future__ import annotations


import numpy as np

from shoal.core import Mixture
from shoal.core.missing import expected_scatter
from shoal.daemon.files.gaps import observed_counts

__all__ = ["GapPiece", "gap_piece", "add_gap_sums", "merge_gap_sums", "window_shares",
           "missing_note", "GAP_KEYS"]

GAP_KEYS = ("miss", "miss2", "imputed")
MOSTLY_MISSING = 0.5    # explanations name a feature missing from more of a segment's rows


class GapPiece:
    """A learned piece's rows with missing features, ready for the window sums.

    ``Xc`` the centred rows with the missing values at zero (the centre), ``resp`` the
    responsibilities with the gappy rows' columns at zero (for the ordinary scatter),
    and per segment ``imputed`` (K, D), ``scatter`` (K, D, D), ``miss`` and ``miss2`` (K, D).
    """

    __slots__ = ("Xc", "resp", "imputed", "scatter", "miss", "miss2")


def gap_piece(mixture: Mixture, X: np.ndarray, Xc: np.ndarray, resp_kn: np.ndarray):
    """The :class:`GapPiece` of a piece ``X`` (data units) whose centred rows are ``Xc``
    (NaN where missing; filled in place), or None if no value is missing."""
    D = X.shape[1]
    rows = np.flatnonzero(observed_counts(X) < D)
    if rows.size == 0:
        return None
    mask = np.isnan(X[rows])
    Xc[rows] = np.where(mask, 0.0, Xc[rows])
    R = resp_kn[:, rows]
    Zf = Xc[rows] / mixture.scale
    s1, scatter = expected_scatter(mixture, Zf, mask, R)
    out = GapPiece()
    out.Xc = Xc
    out.resp = resp_kn.copy()
    out.resp[:, rows] = 0.0
    # the E-step's first moments of these rows minus what the filled rows give
    out.imputed = (s1 - R @ Zf) * mixture.scale
    out.scatter = scatter * np.outer(mixture.scale, mixture.scale)
    m = mask.astype(np.float64)
    out.miss = R @ m
    out.miss2 = (R * R) @ m
    return out


def add_gap_sums(sums: dict, piece: GapPiece) -> None:
    """Add a piece's extra sums to an accumulator of arrays by segment position."""
    sums["M"] += piece.imputed
    sums["S"] += piece.scatter
    for key in GAP_KEYS:
        value = getattr(piece, key)
        sums[key] = value.copy() if key not in sums else sums[key] + value


def merge_gap_sums(acc: dict, sums: dict, k: int, add) -> None:
    """Segment ``k``'s extra sums of ``sums`` into ``acc`` (one segment's sums)."""
    for key in GAP_KEYS:
        if key in sums:
            acc[key] = add(acc.get(key), sums[key][k])


def window_shares(segments: dict) -> dict:
    """Per segment id: the share of its rows that missed each feature (zeros if none)."""
    out = {}
    for sid, acc in segments.items():
        if acc.get("T", 0.0) > 0.0 and acc.get("miss") is not None:
            out[sid] = (np.asarray(acc["miss"]) / acc["T"]).tolist()
    return out


def missing_note(info: dict, names) -> str | None:
    """A clause naming the features missing from most of a segment's rows, or None."""
    shares = (info.get("missing") or {}).get("shares")
    if not shares:
        return None
    mostly = [f"{names[j]} ({s:.0%})" for j, s in enumerate(shares) if s > MOSTLY_MISSING]
    return ("mostly missing in the window: " + ", ".join(mostly)) if mostly else None
