"""The rows the lifecycle decides on: each segment's sample, which the split test reads,
and the pool of rows no segment explains, which births come from.

Both are fed a piece of rows at a time (:class:`~shoal.daemon.segments.segment_life.
LifeWatch` calls them as pieces are learned) and both wait to do the work until a
decision needs its result, or the input ends and the checkpoint takes them: most pieces
then cost a few array steps, and what the decisions see, and what the checkpoint keeps,
is exactly what doing the work at every piece would give.

Samples  every ``SAMPLE_STRIDE``-th row of the stream (by position, so the same rows
         whatever the cut) goes to its segment's sample, which keeps the newest
         ``cap`` rows, rounded to float32 as the checkpoint keeps them. A piece's rows
         wait, with their segments and per-segment counts, until a segment's split
         test takes its newest rows (:meth:`Samples.take`).
Pool     only rows under the log-density bound of
         :func:`~shoal.core.lifecycle.unexplained_below` can be unexplained; they wait
         with the model that scored them and are tested and pooled when pool and
         waiting rows together could make a birth (:meth:`UnexplainedPool.settle`).
         Rows leave the pool by age (``pool_span_rows``), only the newest
         ``pool_rows`` stay, and a birth takes its group's rows out.
"""
from __future__ import annotations

import base64
import collections
import functools

import numpy as np

from shoal.core import Mixture
from shoal.core.lifecycle import (squared_mahalanobis, unexplained_below, unexplained_scored,
                                  widening_explains)

__all__ = ["Samples", "UnexplainedPool", "SAMPLE_STRIDE", "first_sampled"]

SAMPLE_STRIDE = 4


def first_sampled(n_rows: int) -> int:
    """The first sampled row of a piece that starts after ``n_rows`` learned rows: every
    ``SAMPLE_STRIDE``-th row of the stream is sampled, whatever the cut into pieces."""
    return (-int(n_rows)) % SAMPLE_STRIDE


_SAMPLE_MIN, _SAMPLE_PER_FEATURE, _SAMPLE_MAX = 200, 50, 500
"""A segment's sample holds its newest 50 rows per feature, 200 to 500 rows."""
_WAITING_VALUES = 1 << 21
"""Sampled rows wait for their segments' samples, at most this many values (8 MiB as the
learning loop hands them over: float32, copied out by
:func:`~shoal.core.piece_tallies.piece_tallies`)."""
_WAITING_PIECES = 32
"""Rows under the unexplained bound wait for their exact test, from at most this many
pieces (their responsibilities and log-densities wait with them, copied)."""


def _pack(rows: np.ndarray) -> str:
    """Rows as base64 of their float32 bytes: the checkpoint's JSON carries a sample of
    hundreds of rows as one string, which encodes and decodes far faster than lists.
    Seven digits are plenty for a split test, and every input reads the sample back
    from this form, so a restart sees exactly what an uninterrupted run does. The rows
    are remembered by their string: the next input of a running service reads them
    back from there rather than decoding the string again."""
    rows32 = np.ascontiguousarray(rows, dtype="<f4")
    packed = base64.b64encode(rows32.tobytes()).decode("ascii")
    _unpacked[packed] = _read_only(rows32.astype(np.float64))   # what decoding gives
    while len(_unpacked) > _UNPACKED_KEPT:
        _unpacked.popitem(last=False)
    return packed


def _unpack(packed: str | None, n_features: int) -> np.ndarray:
    if not packed:
        return np.empty((0, n_features))
    rows = _unpacked.get(packed)
    if rows is None or rows.shape[1] != n_features:
        rows = _decoded(packed, n_features)
    return rows


def _decoded(packed: str, n_features: int) -> np.ndarray:
    rows = np.frombuffer(base64.b64decode(packed), dtype="<f4").reshape(-1, n_features)
    return rows.astype(np.float64)


def _read_only(rows: np.ndarray) -> np.ndarray:
    rows.flags.writeable = False
    return rows


_UNPACKED_KEPT = 64
"""Samples packed last, remembered by their string (a segment's sample is about 50 KB
packed and 64 KB as rows at D=16)."""
_unpacked: collections.OrderedDict[str, np.ndarray] = collections.OrderedDict()


@functools.lru_cache(maxsize=16)
def _strided(first: int, n: int) -> np.ndarray:
    """Positions ``first, first + SAMPLE_STRIDE, ...`` below ``n`` (read-only)."""
    picked = np.arange(first, n, SAMPLE_STRIDE)
    picked.flags.writeable = False
    return picked


class Samples:
    """Every segment's sample: the packed samples of ``state["sample"]`` (segment id as
    a string -> base64 rows), unpacked as they are used, and the rows still waiting."""

    def __init__(self, state: dict, n_features: int):
        self.state = state
        self.n_features = n_features
        self.cap = int(min(max(_SAMPLE_MIN, _SAMPLE_PER_FEATURE * n_features), _SAMPLE_MAX))
        self._rows: dict[str, np.ndarray] = {}   # unpacked samples, packed at the end
        # numbered pieces: [number, sampled rows, their segments, their log-densities
        # (None once none is +inf), rows per segment]; the piece from which each
        # segment has still to take rows
        self._waiting: list[list] = []
        self._pieces = self._values = 0
        self._taken: dict[int, int] = {}

    def add(self, X: np.ndarray, first: int, labels: np.ndarray, log_density: np.ndarray,
            counts: dict, live: list[int], rows: np.ndarray | None = None) -> None:
        """Rows ``first, first + SAMPLE_STRIDE, ...`` of a piece ``X``, whose ``labels``
        (segment ids) and ``log_density`` are those of the same rows; ``counts`` their
        number per segment id; ``live`` the model's segment ids. ``rows``: those rows
        already copied out, as float32 (what a sample keeps: :meth:`take` rounds them)."""
        if rows is None:
            rows = X.take(_strided(first, len(X)), axis=0)
        self._waiting.append([self._pieces, rows, labels, log_density, counts])
        self._pieces += 1
        self._values += rows.size
        if self._values > _WAITING_VALUES:
            self.take_all(live)

    def take(self, sid: int) -> np.ndarray:
        """Segment ``sid``'s sample, shape (n, n_features), with its waiting rows taken in
        (newest first, until ``cap`` are found, from the pieces it has not taken from
        yet). Rows scored at log-density ``+inf``, those with missing features
        (``complete_only``), have no place in a split test's sample."""
        key = str(sid)
        since = self._taken.get(sid, -1)
        found, count = [], 0
        for waiting in reversed(self._waiting):
            piece, rows, labels, log_density, counts = waiting
            if piece < since or count >= self.cap:
                break
            if sid in counts:
                mine = labels == sid
                if log_density is not None:
                    if log_density.max() < np.inf:   # no row misses a feature
                        waiting[3] = None
                    else:
                        mine &= log_density != np.inf
                found.append(rows[mine])
                count += found[-1].shape[0]
        self._taken[sid] = self._pieces
        if found:
            found.append(self._sample(key))
            # rounded as the checkpoint keeps them (float32), so a restart sees the same
            rows = np.concatenate(found[::-1])[-self.cap:]
            self._rows[key] = rows.astype(np.float32).astype(np.float64)
        return self._sample(key)

    def take_all(self, live) -> None:
        """Every waiting row into the samples of the segments in ``live`` (ids); rows of
        segments that left since are dropped with their samples."""
        for sid in live or ():
            self.take(sid)
        self._waiting, self._values, self._taken = [], 0, {}

    def restart(self, sid: int) -> None:
        """An empty sample for ``sid`` (a part of a split): rows that waited were the
        whole segment's."""
        self._rows[str(sid)] = np.empty((0, self.n_features))
        self._taken[sid] = self._pieces

    def keep_only(self, live: set[str]) -> None:
        """Forget the samples of segments that left (``live``: the others' keys)."""
        self.state["sample"] = {key: v for key, v in self.state.setdefault("sample", {}).items()
                                if key in live}
        self._rows = {key: v for key, v in self._rows.items() if key in live}

    def pack(self, live) -> None:
        """The samples into ``state["sample"]``, every waiting row taken in."""
        self.take_all(live)
        sample = self.state.setdefault("sample", {})
        for key, rows in self._rows.items():
            sample[key] = _pack(rows)

    def _sample(self, key: str) -> np.ndarray:
        if key not in self._rows:
            self._rows[key] = _unpack(self.state.get("sample", {}).get(key), self.n_features)
        return self._rows[key]


class UnexplainedPool:
    """The pool of rows no segment explains: ``X`` (rows, data units) and ``rows`` (their
    stream positions, ascending), from and back to ``state["pool"]``, with the rows
    under the bound still waiting for their exact test."""

    def __init__(self, pool: dict, n_features: int, quantile: float, keep: int):
        self.quantile, self.keep = quantile, keep
        self.X = np.array(pool["X"], dtype=np.float64).reshape(-1, n_features)
        self.rows = np.array(pool["rows"], dtype=np.int64)
        order = np.argsort(self.rows, kind="stable")   # kept in stream order
        if np.any(order != np.arange(order.size)):
            self.X, self.rows = self.X[order], self.rows[order]
        # (model that scored them, their rows, responsibilities and log-densities,
        # their positions in the piece, the stream position of the last)
        self._waiting: list[tuple] = []
        self.waiting_rows = 0

    def near_bound(self, before: Mixture) -> float:
        """The log-density under which a row that ``before`` scored may be unexplained
        (:func:`~shoal.core.unexplained.unexplained_below`, with a margin of 1e-9, far
        above rounding, that keeps every unexplained row)."""
        return unexplained_below(before, self.quantile) + 1e-9

    def add(self, before: Mixture, X: np.ndarray, scores, near: np.ndarray | None = None) -> None:
        """The rows of a piece ``X`` that ``before`` scored (``scores``) and that may be
        unexplained (``near``: the positions of those under :meth:`near_bound`, None:
        found here) wait."""
        log_density = scores.log_density
        if near is None:
            near = np.flatnonzero(log_density < self.near_bound(before))
        if near.size:
            last = int(before.n_rows) + int(near[-1])   # the stream position of its last row
            # the piece's score buffers are reused for the next piece: what waits is copied
            self._waiting.append((before, X[near], scores.resp[near], log_density[near], near,
                                  last))
            self.waiting_rows += near.size
            if len(self._waiting) > _WAITING_PIECES:
                self.settle()

    def settle(self) -> None:
        """The waiting rows tested (each with the model that scored it) and the
        unexplained ones pooled, the newest ``keep`` kept: the pool that testing every
        piece at once would hold."""
        if not self._waiting:
            return
        waiting, self._waiting, self.waiting_rows = self._waiting, [], 0
        pool_X, pool_rows = [self.X], [self.rows]
        for before, X_near, resp, log_density, near, _ in waiting:
            far = unexplained_scored(before, resp, log_density, self.quantile)
            if far.size:
                pool_X.append(X_near[far])
                pool_rows.append(before.n_rows + near[far])
        self.X = np.concatenate(pool_X)[-self.keep:]
        self.rows = np.concatenate(pool_rows)[-self.keep:]

    def trim(self, since: int) -> None:
        """Rows before stream position ``since`` leave (waiting ones too)."""
        if self.rows.size and self.rows[0] < since:
            cut = int(np.searchsorted(self.rows, since))
            self.X, self.rows = self.X[cut:], self.rows[cut:]
        while self._waiting and self._waiting[0][5] < since:   # all its rows too old
            self.waiting_rows -= self._waiting.pop(0)[4].size

    def ring_widening(self, mixture: Mixture, mean, count: int, reg_covar: float):
        """The widening test on every pooled row nearest the group's segment, when the
        group (``mean``, ``count`` rows) is less than half of them: a spread that grew
        leaves a ring of rows around the segment, and a compact arc of it is a group
        that does not surround the segment although the ring does. ``(None, nan)``
        otherwise (:func:`~shoal.core.lifecycle.widening_explains`)."""
        nearest = np.argmin(squared_mahalanobis(mixture, self.X), axis=1)
        k = int(np.argmin(squared_mahalanobis(mixture, np.asarray(mean)[None])[0]))
        ring = self.X[nearest == k]
        d = mixture.n_features
        if len(ring) < 2 * count or len(ring) < d + 2:
            return None, float("nan")   # the group is most of them: it stands on its own
        cov = np.cov(ring, rowvar=False) + reg_covar * np.eye(d)
        try:
            return widening_explains(mixture, ring, ring.mean(axis=0), cov, self.quantile)
        except np.linalg.LinAlgError:
            return None, float("nan")

    def remove(self, members: np.ndarray) -> None:
        """Rows that a birth took (``members``: a mask over the settled pool)."""
        self.X, self.rows = self.X[~members], self.rows[~members]

    def to_state(self) -> dict:
        self.settle()
        return {"X": self.X.tolist(), "rows": self.rows.tolist()}
