"""The backfill's worker tasks: survey a file, the warm-up rows, a piece's statistics,
labels files.

Module-level functions, as Dask sends them to the workers by reference. Each reads
its file again (refusing it if it changed since the survey) and returns nothing
row-sized: a file's facts, a piece's weighted statistics and counts, or the name of
the labels file it wrote atomically (the service's names and columns). Pieces of a
file split between rounds keep their scores in a hidden folder of the outbox until
the file's labels are assembled.
"""
from __future__ import annotations

import os
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from shoal.config import Settings
from shoal.core.distributed import partition_statistics, round_weights
from shoal.daemon.backfill.plan import BackfillError, FileFacts, Piece
from shoal.daemon.errors import InputRefused, InputRejected, InputVanished
from shoal.daemon.files.digest import digest_file
from shoal.daemon.files.gaps import observed_counts
from shoal.daemon.files.labels_schema import conform, first_schema, schema_from_text, schema_text
from shoal.daemon.files.readers import Frame, read_input
from shoal.daemon.files.writer import atomic_file, labels_name, labels_table, write_labels
from shoal.daemon.files.opening import open_input
from shoal.daemon.ingest.endings import labels_metadata
from shoal.daemon.intake.gate import input_kind
from shoal.daemon.segments.segment_names import with_segment_names

__all__ = ["survey_file", "head_rows", "PieceResult", "LabelsTo", "piece_statistics",
           "save_scores", "label_file", "assemble_labels", "ScoreSlice"]


def survey_file(index: int, path: str, settings: Settings,
                algorithm: str) -> FileFacts:
    """Hash (with ``algorithm``, the state store's), read and validate one input (on a
    worker)."""
    p = Path(path)
    facts = FileFacts(index=index, path=str(p), name=p.name, digest_algorithm=algorithm)
    try:
        with open_input(p) as f:
            st = os.fstat(f.fileno())
            facts = replace(facts, size=st.st_size, mtime_ns=st.st_mtime_ns)
            if st.st_size == 0:
                raise InputRejected("empty", "the input is empty (0 bytes)")
            if st.st_size > settings.limits.max_file_bytes:
                raise InputRejected("too_large", f"{st.st_size} bytes, more than "
                                    f"limits.max_file_bytes={settings.limits.max_file_bytes}")
            facts = replace(facts, digest=digest_file(f, algorithm))
            kind = input_kind(p.name)
            # rows skipped under input.bad_rows: skip are left out of every read alike
            frame = read_input(f, kind, settings, skipped=[])
            schema = schema_text(first_schema(frame.passthrough, kind != "parquet",
                                              dict(settings.passthrough_types)))
    except InputRejected as exc:
        return replace(facts, reason=exc.reason, detail=exc.detail)
    except (InputVanished, InputRefused) as exc:
        return replace(facts, reason="unreadable", detail=str(exc))
    return replace(facts, rows=frame.n_rows, rows_invalid=frame.n_invalid,
                   labels_schema=schema)


def _read_again(facts: FileFacts, settings: Settings) -> Frame:
    """Read a surveyed file again; refuse it if it changed since the survey."""
    with open_input(Path(facts.path)) as f:
        st = os.fstat(f.fileno())
        if (st.st_size, st.st_mtime_ns) != (facts.size, facts.mtime_ns):
            raise BackfillError(f"{facts.path} changed during the backfill (size or "
                                "modification time differs from the survey); run the "
                                "backfill again on files that are no longer written")
        return read_input(f, input_kind(facts.name), settings, skipped=[])


def head_rows(files: list[FileFacts], settings: Settings, n_rows: int) -> np.ndarray:
    """The first ``n_rows`` valid rows of ``files`` in order (the warm-up buffer)."""
    parts, have = [], 0
    for facts in files:
        if have >= n_rows:
            break
        frame = _read_again(facts, settings)
        X = frame.features[frame.valid][: n_rows - have]
        parts.append(X)
        have += len(X)
    return np.concatenate(parts) if parts else np.empty((0, len(settings.features)))


@dataclass(frozen=True)
class PieceResult:
    """What one piece's task returns: its weighted statistics under the round's
    snapshot, its rows per most responsible component, and the quantile of its rows'
    log-densities that moves the unusual-row threshold."""

    stats: object                    # PartitionStatistics
    counts: np.ndarray               # (n_components,) rows per most responsible component
    log_density_quantile: float      # at output.unusual_quantile, under the snapshot


@dataclass(frozen=True)
class LabelsTo:
    """How a file's labels are written: its model version, the unusual-row threshold, the
    outbox, and the folder where pieces of a file split between rounds keep their scores."""

    version: int
    unusual_below: float
    outbox: str
    stage: str
    names: tuple = ()      # (segment id, name) pairs for a segment_name column; () for none
    schema: str | None = None   # the stream's pass-through types (labels_schema)


def piece_statistics(facts: FileFacts, piece: Piece, stop: int, snapshot,
                     settings: Settings, labels: LabelsTo | None = None) -> PieceResult:
    """The statistics of one piece of a round under the round's snapshot (on a worker).

    With ``labels``, the rows' scores become labels: the labels file at once when the
    piece is the whole file, else kept in ``labels.stage`` until the file is complete.
    """
    frame = _read_again(facts, settings)
    X = frame.features[frame.valid][piece.lo:piece.hi]
    weights = round_weights(snapshot.schedule, piece.at, piece.at + len(X), stop)
    stats, scores = partition_statistics(snapshot, X, weights)
    if labels is not None and piece.lo == 0 and len(X) == facts.valid_rows:
        _write_labels(facts, settings, frame, scores.segment, scores.confidence,
                      scores.log_density, labels.unusual_below, labels.version,
                      labels.outbox, labels.names, labels.schema)
    elif labels is not None:
        save_scores(Path(labels.stage), facts.index, piece.lo, scores)
    counts = np.bincount(scores.component, minlength=snapshot.n_components)
    q = float(np.quantile(scores.log_density, settings.output.unusual_quantile))
    return PieceResult(stats, counts, q)


def save_scores(stage: Path, index: int, lo: int, scores) -> Path:
    """Scores of valid rows ``lo..`` of file ``index``, atomically (a retried task writes
    the same bytes again)."""
    target = stage / f"{index:06d}.{lo:012d}.npz"
    with atomic_file(target) as f:
        np.savez(f, segment=scores.segment, confidence=scores.confidence,
                 log_density=scores.log_density)
    return target


def _write_labels(facts: FileFacts, settings: Settings, frame: Frame, segment, confidence,
                  log_density, unusual_below: float, version: int, outbox: str,
                  names: tuple = (), schema: str | None = None) -> str:
    fmt = settings.output.format
    passthrough = frame.passthrough
    if schema is not None:   # the stream's pass-through types, as the service writes them
        from_text = input_kind(facts.name) != "parquet"
        try:
            passthrough = conform(passthrough, schema_from_text(schema), from_text,
                                  2 if from_text else 1)
        except InputRejected as exc:
            raise BackfillError(f"{facts.name}: {exc.detail}") from exc
    table = labels_table(passthrough, frame.valid, segment, confidence, log_density,
                         unusual_below, version, observed=observed_counts(frame.features))
    if settings.output.segment_names:
        (table,) = with_segment_names([table], dict(names))
    target = Path(outbox) / labels_name(facts.name, facts.digest, fmt)
    write_labels(table, target, fmt, labels_metadata(facts.digest, facts.digest_algorithm,
                                                      facts.name, version))
    return target.name


def label_file(facts: FileFacts, settings: Settings, model, version: int,
               unusual_below: float, outbox: str, names: tuple = (),
               schema: str | None = None) -> str:
    """Label every row of one input with ``model``; write the labels file atomically."""
    frame = _read_again(facts, settings)
    scores = model.score(frame.features[frame.valid])
    return _write_labels(facts, settings, frame, scores.segment, scores.confidence,
                         scores.log_density, unusual_below, version, outbox, names, schema)


def assemble_labels(facts: FileFacts, settings: Settings, labels: LabelsTo) -> str:
    """The labels file of one input from the scores its pieces kept in ``labels.stage``."""
    frame = _read_again(facts, settings)
    parts = [np.load(p, allow_pickle=False)
             for p in sorted(Path(labels.stage).glob(f"{facts.index:06d}.*.npz"))]
    cols = {name: np.concatenate([p[name] for p in parts]) if parts else np.empty(0)
            for name in ("segment", "confidence", "log_density")}
    if len(cols["segment"]) != facts.valid_rows:
        raise BackfillError(f"{facts.name}: the rounds scored {len(cols['segment'])} of its "
                            f"{facts.valid_rows} valid rows")
    return _write_labels(facts, settings, frame, cols["segment"], cols["confidence"],
                         cols["log_density"], labels.unusual_below, labels.version,
                         labels.outbox, labels.names, labels.schema)


class ScoreSlice:
    """Rows ``a..b`` of some scores (what :func:`save_scores` reads)."""

    def __init__(self, scores, a: int, b: int):
        self.segment = scores.segment[a:b]
        self.confidence = scores.confidence[a:b]
        self.log_density = scores.log_density[a:b]
