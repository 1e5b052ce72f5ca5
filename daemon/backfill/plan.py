"""The backfill's plan: which files, and the learned stream cut into rounds of pieces.

:func:`list_sources` takes the files named (and the Parquet/CSV files inside folders
named); a survey gives each its :class:`FileFacts` (nothing row-sized); the learned
stream, the valid rows of the learned files in order after the warm-up, is cut at
global multiples of the round size (:func:`round_size`, a multiple of the model's
refresh interval) into :class:`Round` s, each a :class:`Piece` per file it touches
(:func:`plan_rounds`).
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from shoal.daemon.errors import ServiceError, UsageError
from shoal.daemon.intake.gate import input_kind

__all__ = ["BackfillError", "ClusterUnavailable", "FileFacts", "Piece", "Round",
           "round_size", "plan_rounds", "list_sources", "DEFAULT_ROUND_ROWS", "LABEL_MODES"]

DEFAULT_ROUND_ROWS = 1 << 20
LABEL_MODES = ("round", "final")


class BackfillError(ServiceError):
    """The backfill cannot go on (too little history, a file changed under it...)."""

    exit_code = 1


class ClusterUnavailable(ServiceError):
    """The Dask scheduler cannot be reached, or Dask is not installed."""

    exit_code = 4


@dataclass(frozen=True)
class FileFacts:
    """What a worker found in one input: nothing row-sized."""

    index: int
    path: str
    name: str
    size: int = 0
    mtime_ns: int = 0
    digest: str | None = None           # of the content, in ``digest_algorithm``
    digest_algorithm: str | None = None
    rows: int = 0
    rows_invalid: int = 0
    reason: str | None = None       # set when the file is refused (quarantined)
    detail: str | None = None
    labels_schema: str | None = None   # the pass-through types it would fix as a first input

    @property
    def valid_rows(self) -> int:
        return self.rows - self.rows_invalid


@dataclass(frozen=True)
class Piece:
    """Valid rows ``lo .. hi-1`` of one file, at global stream rows ``at+1 .. at+hi-lo``,
    in pass ``pass_no`` over the history."""

    file: int
    lo: int
    hi: int
    at: int
    pass_no: int = 0


@dataclass(frozen=True)
class Round:
    """Global stream rows ``start+1 .. stop`` learned from one parameter snapshot, as
    ``pieces`` (one per file they touch, in stream order); ``refresh``: the round ends
    on a multiple of the round size, where the parameters are refreshed."""

    start: int
    stop: int
    pieces: tuple[Piece, ...]
    refresh: bool                   # ends on a multiple of the round size


def round_size(round_rows: int, refresh_rows: int) -> int:
    """``round_rows`` rounded up to a whole number of the model's refresh intervals."""
    if round_rows < 1:
        raise UsageError(f"--round-rows should be at least 1, got {round_rows}")
    return -(-round_rows // refresh_rows) * refresh_rows


def plan_rounds(valid_rows: list[tuple[int, int]], skip: int, n0: int,
                size: int, passes: int = 1) -> list[Round]:
    """Cut the learned stream into rounds ending at global multiples of ``size``.

    ``valid_rows`` lists (file index, valid rows) in stream order; the first ``skip``
    rows went to the warm-up; the model has learned ``n0`` rows before the first round.
    With ``passes`` > 1 the stream is the history again, every row of it, after the first.
    """
    spans = []                      # (file, lo, hi, global start, pass)
    at = n0
    for pass_no in range(passes):
        for index, n in valid_rows:
            lo = min(skip, n)
            skip -= lo
            if n > lo:
                spans.append((index, lo, n, at, pass_no))
                at += n - lo
    end = at
    rounds, start, k = [], n0, 0
    while start < end:
        stop = min((start // size + 1) * size, end)
        pieces = []
        while k < len(spans):
            index, lo, hi, g, pass_no = spans[k]
            a, b = max(start, g), min(stop, g + hi - lo)
            if a < b:
                pieces.append(Piece(index, lo + a - g, lo + b - g, a, pass_no))
            if g + hi - lo > stop:
                break
            k += 1
        rounds.append(Round(start, stop, tuple(pieces), stop % size == 0))
        start = stop
    return rounds


def list_sources(sources) -> list[Path]:
    """Files named, and the Parquet/CSV files inside folders named (sorted by name, hidden
    files skipped), in the order given; each file once."""
    out, seen = [], set()
    for source in sources:
        path = Path(source)
        if path.is_dir():
            found = sorted(p for p in path.iterdir() if p.is_file()
                           and not p.name.startswith(".") and input_kind(p.name) is not None)
        elif path.is_file():
            if input_kind(path.name) is None:
                raise UsageError(f"{path}: expected a name ending in .csv, .csv.gz, .parquet "
                                 "or .pq")
            found = [path]
        else:
            raise UsageError(f"no such file or folder: {path}")
        for p in found:
            key = p.resolve()
            if key not in seen:
                seen.add(key)
                out.append(p)
    return out
