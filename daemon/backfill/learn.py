"""``shoal backfill``: learn a history of files on a Dask cluster, into a normal state folder.

The coordinator (this process) owns the model; workers own the rows.

1. Survey: every file is hashed, read and validated by a worker, which returns its
   facts (content digest in the state store's algorithm, size, rows, invalid rows, or why
   it is refused) and nothing row-sized.
   Files already in the ledger under the same name are skipped; a repeated content is
   a duplicate (labelled, not learned); a refused file is quarantined (sidecar only,
   the file stays where it is).
2. Warm-up: without a model yet, the first ``warmup_rows`` valid rows (fetched from a
   worker) start the model exactly as the service's warm-up does.
3. Rounds: the learned stream (valid rows of the learned files, in order, after the
   warm-up rows) is cut at global multiples of the round size ``R`` (a multiple of the
   model's ``refresh_rows``). Each round's rows are split into pieces, one per file it
   touches. The coordinator broadcasts the parameter snapshot; each piece's task returns
   the piece's weighted statistics (:func:`shoal.core.distributed.partition_statistics`
   with the exact per-row weights of the step schedule) and a few per-piece counts.
   Results are keyed by piece, so a task that Dask runs again after a worker died is
   still counted once. The coordinator adds them in piece order and applies the
   stepwise update and a parameter refresh (:func:`shoal.core.distributed.apply_round`).
   The result equals ``Mixture.learn`` over the same stream with ``refresh_rows = R``,
   and a history backfilled in two runs ends where one run does. ``passes`` > 1 runs
   the stream again over the whole history.
4. Labels (the service's file names and columns, written atomically by the workers):
   ``labels="round"`` labels each row with the snapshot that scored it in the (last)
   pass; a piece that holds a whole file writes its labels file in the round, pieces of
   a file split between rounds (or by the warm-up) keep their scores in a hidden folder
   of the outbox until the file is assembled. ``labels="final"`` scores every row again
   with the final model. Duplicates are labelled by the final model.
5. Commit: ONE state-store transaction holds a ledger row per file (model versions
   advancing by one per learned file, as the service counts them), the final checkpoint
   and its segment history. ``shoal watch`` on the same state continues from there and
   never takes those files again.

Dask's ``distributed`` is imported only here (``pip install 'shoal[cluster]'``).
"""
from __future__ import annotations

import contextlib
import logging
import os
import shutil
import threading
import time
import uuid
from concurrent.futures import CancelledError
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Iterator

import numpy as np

from shoal.config import Settings
from shoal.core.distributed import apply_round, partition_statistics, round_weights
from shoal.daemon.files.digest import digest_file
from shoal.daemon.errors import (
    InputRefused,
    InputRejected,
    InputVanished,
    Interrupted,
    ServiceError,
    UsageError,
)
from shoal.daemon.files.gaps import observed_counts
from shoal.daemon.intake.gate import input_kind
from shoal.daemon.model.contract import open_model_store
from shoal.daemon.files.layout import Layout, StateLock, prepare_folders, remove_stale_temps
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.ingest.claim import open_input
from shoal.daemon.ingest.endings import labels_metadata
from shoal.daemon.ingest.learning import UNUSUAL_MEMORY_ROWS, history_rows, warm_up
from shoal.daemon.ingest.pipeline import Pipeline
from shoal.daemon.runtime.progress import progress
from shoal.daemon.files.quarantine import quarantine
from shoal.daemon.files.labels_schema import conform, first_schema, schema_from_text, schema_text
from shoal.daemon.files.readers import Frame, read_input
from shoal.daemon.segments.segment_names import segment_names, with_segment_names
from shoal.daemon.state.store import Checkpoint, HistoryRow, LedgerEntry, StateStore
from shoal.daemon.files.writer import atomic_file, labels_name, labels_table, write_labels

__all__ = ["backfill", "BackfillReport", "BackfillError", "ClusterUnavailable", "FileFacts",
           "Piece", "Round", "plan_rounds", "list_sources", "round_size",
           "add_backfill_command", "DEFAULT_ROUND_ROWS"]

DEFAULT_ROUND_ROWS = 1 << 20
LABEL_MODES = ("round", "final")
_ATTEMPTS = 3               # broadcasts of one snapshot before a round gives up
_STAGE = ".shoal-backfill"   # in the outbox: the rounds' scores until the labels are written
INSTALL_HINT = "pip install 'shoal[cluster]'"


class BackfillError(ServiceError):
    """The backfill cannot go on (too little history, a file changed under it...)."""

    exit_code = 1


class ClusterUnavailable(ServiceError):
    """The Dask scheduler cannot be reached, or Dask is not installed."""

    exit_code = 4


# -- plan --------------------------------------------------------------------------
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


# -- worker tasks (module-level functions: Dask sends them by reference) ------------------
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


# -- the cluster -------------------------------------------------------------------
def _distributed():
    try:
        import distributed
    except ImportError as exc:
        raise ClusterUnavailable(f"shoal backfill needs Dask's distributed scheduler, which "
                                 f"is not installed: {INSTALL_HINT}") from exc
    return distributed


@contextlib.contextmanager
def cluster_client(scheduler: str | None = None, local_workers: int | None = None,
                   connect_timeout: float = 10.0) -> Iterator:
    """A Dask client: connected to ``scheduler``, or to a local cluster of worker processes."""
    distributed = _distributed()
    if scheduler is not None:
        try:
            client = distributed.Client(scheduler, timeout=connect_timeout,
                                        set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            raise ClusterUnavailable(f"the Dask scheduler at {scheduler} cannot be reached "
                                     f"within {connect_timeout:g} s: {exc}") from exc
        with contextlib.closing(client):
            yield client
        return
    workers = local_workers or os.cpu_count() or 1
    with distributed.LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster:
        with distributed.Client(cluster, set_as_default=False) as client:
            yield client


# -- the run -----------------------------------------------------------------------
def _first_model_version(learned: list[FileFacts], warmup_rows: int,
                         versions: dict[int, int]) -> int | None:
    """The model version of the file whose rows complete the warm-up (its model is the
    first); None if no file does."""
    at = 0
    for f in learned:
        at += f.valid_rows
        if at >= warmup_rows:
            return versions[f.index]
    return None


@dataclass
class BackfillReport:
    files: int = 0
    learned: int = 0
    duplicates: int = 0
    skipped: int = 0
    quarantined: int = 0
    rows: int = 0                   # rows learned in rounds (after the warm-up)
    warmup_rows: int = 0
    rounds: int = 0
    round_rows: int = 0
    broadcasts_again: int = 0       # snapshots lost with every worker holding them
    model_version: int = 0
    labels: list[str] = field(default_factory=list)
    seconds: float = 0.0


def backfill(settings: Settings, sources, *, client=None, scheduler: str | None = None,
             local_workers: int | None = None, round_rows: int = DEFAULT_ROUND_ROWS,
             labels: str = "round", passes: int = 1, connect_timeout: float = 10.0,
             stop: threading.Event | None = None, wall=time.time) -> BackfillReport:
    """Learn ``sources`` (files or folders) into the state folder of ``settings``.

    ``client`` is a ``distributed.Client`` to use; without it one is made for
    ``scheduler`` or for a local cluster of ``local_workers`` processes.
    ``labels``: ``"round"`` labels each row with the snapshot that scored it while
    learning (one pass, as the service labels); ``"final"`` labels every row again with
    the final model (a second scoring pass). ``passes`` > 1 learns the history again
    after the first pass (labels come from the last).
    """
    if labels not in LABEL_MODES:
        raise UsageError(f"labels should be one of {LABEL_MODES}, got {labels!r}")
    if passes < 1:
        raise UsageError(f"passes should be at least 1, got {passes}")
    if any(kind != "none" for kind in settings.transform_kinds):
        raise UsageError("shoal backfill does not apply transforms yet: learn a history "
                         "with transformed features through shoal ingest")
    stop = stop or threading.Event()
    paths = list_sources(sources)
    if not paths:
        raise UsageError("no Parquet or CSV files in the sources given")
    layout = prepare_folders(settings)
    with StateLock(layout.lock):
        remove_stale_temps(layout)
        store = open_model_store(layout, settings, write=True)
        try:
            pipeline = Pipeline(settings, layout, store, stop=stop, wall=wall)
            if client is not None:
                return BackfillRun(settings, layout, store, pipeline, client, stop, wall).run(
                    paths, round_rows, labels, passes)
            with cluster_client(scheduler, local_workers, connect_timeout) as made:
                return BackfillRun(settings, layout, store, pipeline, made, stop, wall).run(
                    paths, round_rows, labels, passes)
        finally:
            store.close()


class BackfillRun:
    def __init__(self, settings, layout: Layout, store: StateStore, pipeline: Pipeline,
                 client, stop: threading.Event, wall):
        self.settings, self.layout, self.store = settings, layout, store
        self.pipeline, self.client, self.stop, self.wall = pipeline, client, stop, wall
        self.tag = uuid.uuid4().hex[:12]   # task keys of this run
        self.schema: str | None = None     # the stream's pass-through types (labels_schema)
        self.broadcasts_again = 0

    def _check_stop(self) -> None:
        if self.stop.is_set():
            raise Interrupted("stop requested; nothing was committed")

    def _check_stop_warm_up(self) -> None:
        if self.stop.is_set():   # as the service's warm-up says it
            raise Interrupted("stop requested")

    def _gather(self, futures: list) -> list:
        from distributed.scheduler import KilledWorker

        try:
            return self.client.gather(futures)
        except KilledWorker as exc:
            raise BackfillError(f"a task killed its workers again and again ({exc}); see "
                                "the workers' logs") from exc
        except (OSError, TimeoutError) as exc:
            raise ClusterUnavailable(f"lost the Dask scheduler: {exc}") from exc

    def run(self, paths: list[Path], round_rows: int, labels: str,
            passes: int) -> BackfillReport:
        t0 = time.monotonic()
        seen_at = self.wall()
        report = BackfillReport(files=len(paths))
        facts = self._survey(paths)
        learned, duplicates, skipped, refused = self._classify(facts)
        # one labels schema per stream: the store's, else fixed by the first file taken
        self.schema = self.store.labels_schema() or next(
            (f.labels_schema for f in learned + duplicates), None)
        report.learned, report.duplicates = len(learned), len(duplicates)
        report.skipped, report.quarantined = len(skipped), len(refused)
        st = self.pipeline.state
        mixture, extra, skip = st.mixture, dict(st.extra), 0
        clear_warmup = False
        stage = None
        if labels == "round" and learned:
            stage = self.layout.outbox / _STAGE
            shutil.rmtree(stage, ignore_errors=True)   # scores of an unfinished run
            stage.mkdir(mode=0o750)
        if learned and mixture is None:
            mixture, extra, skip = self._warm_up(learned, stage)
            clear_warmup = True
            report.warmup_rows = skip
        base = self.store.model_version
        version = base + len(learned)
        versions = {f.index: base + i + 1 for i, f in enumerate(learned)}
        written = {}   # file index -> its labels file's name, or a future of it
        if mixture is not None and learned:
            size = round_size(round_rows, mixture.refresh_rows)
            report.round_rows = size
            rounds = plan_rounds([(f.index, f.valid_rows) for f in learned], skip,
                                 mixture.n_rows, size, passes)
            if stage is not None:   # files that no round touches (all warm-up rows)
                touched = {p.file for r in rounds for p in r.pieces
                           if p.pass_no == passes - 1}
                # labelled by the first model, under its version (as the service does)
                first = _first_model_version(learned, skip, versions) if clear_warmup \
                    else None
                for f in learned:
                    if f.index not in touched:
                        labelled = versions[f.index] if first is None or not f.valid_rows \
                            else max(versions[f.index], first)
                        written[f.index] = self._assemble(f, labelled,
                                                          extra.get("unusual_below"), stage)
            mixture, extra = self._rounds(mixture, extra, rounds, facts, stage, versions,
                                          written, passes - 1)
            report.rounds = len(rounds)
            report.rows = sum(r.stop - r.start for r in rounds)
        if mixture is not None:
            final = [f for f in learned if f.index not in written] + duplicates
            written.update(self._relabel(final, mixture, version,
                                         extra.get("unusual_below", -np.inf)))
            pending = {i: w for i, w in written.items() if not isinstance(w, str)}
            written.update(zip(pending, self._gather(list(pending.values()))))
            report.labels = [written[i] for i in sorted(written)]
        if stage is not None:
            shutil.rmtree(stage, ignore_errors=True)
        self._check_stop()
        report.model_version = self._commit(facts, learned, duplicates, refused, mixture,
                                            extra, version, clear_warmup, seen_at,
                                            labelled=bool(report.labels))
        report.broadcasts_again = self.broadcasts_again
        report.seconds = round(time.monotonic() - t0, 3)
        log_event("backfill_committed", files=report.files, learned=report.learned,
                  duplicates=report.duplicates, skipped=report.skipped,
                  quarantined=report.quarantined, rows=report.rows, rounds=report.rounds,
                  model_version=report.model_version, duration=report.seconds)
        return report

    # -- stages ------------------------------------------------------------------
    def _survey(self, paths: list[Path]) -> list[FileFacts]:
        algorithm = self.store.digest_algorithm
        futures = [self.client.submit(survey_file, i, str(p), self.settings, algorithm,
                                      key=f"shoal-survey-{self.tag}-{i}")
                   for i, p in enumerate(paths)]
        out = self._gather(futures)
        self._check_stop()
        return out

    def _classify(self, facts: list[FileFacts]):
        learned, duplicates, skipped, refused = [], [], [], []
        seen: set[str] = set()
        for f in facts:
            if f.reason is not None:
                refused.append(f)
                continue
            done = self.store.find_done(f.digest)
            if any(e.name == f.name for e in done):
                skipped.append(f)
            elif done or f.digest in seen:
                duplicates.append(f)
            else:
                learned.append(f)
            seen.add(f.digest)
        return learned, duplicates, skipped, refused

    def _warm_up(self, learned: list[FileFacts], stage: Path | None):
        st = self.pipeline.state
        buffered = 0 if st.warmup is None else len(st.warmup)
        need = max(self.settings.warmup_rows - buffered, 0)
        fut = self.client.submit(head_rows, learned, self.settings, need,
                                 key=f"shoal-head-{self.tag}")
        head = self._gather([fut])[0]
        if len(head) < need:
            raise BackfillError(f"the history holds {buffered + len(head)} valid rows; the "
                                f"warm-up needs warmup_rows={self.settings.warmup_rows}")
        mixture, scores, _, init_extra = warm_up(self.settings, head, st.warmup,
                                                 self._check_stop_warm_up)
        if mixture is None:
            raise BackfillError("the warm-up rows could not start a model (see the "
                                "warmup_not_enough_data log line)")
        extra = dict(self.pipeline.state.extra)
        extra.update(init_extra)
        extra = self._count(extra, mixture, scores.component)
        if stage is not None:   # the warm-up rows are labelled by the first model
            at = 0
            for f in learned:
                take = min(f.valid_rows, need - at)
                if take <= 0:
                    break
                save_scores(stage, f.index, 0, _Slice(scores, at, at + take))
                at += take
        return mixture, extra, need

    def _count(self, extra: dict, mixture, components: np.ndarray) -> dict:
        counts = np.bincount(components, minlength=mixture.n_components)
        return self._add_counts(extra, mixture, counts)

    @staticmethod
    def _add_counts(extra: dict, mixture, counts: np.ndarray) -> dict:
        rows = dict(extra.get("segment_rows", {}))
        for sid, n in zip(mixture.ids.tolist(), counts.tolist()):
            if n:
                rows[str(sid)] = rows.get(str(sid), 0) + int(n)
        return dict(extra, segment_rows=rows)

    def _rounds(self, mixture, extra: dict, rounds: list[Round], facts: list[FileFacts],
                stage: Path | None, versions: dict[int, int], written: dict,
                last_pass: int = 0):
        """Learn the rounds. With ``stage``, pieces of the last pass label their rows with
        the round's snapshot (and the threshold in force when the round began); files
        split between rounds are assembled once complete (futures added to ``written``)."""
        below = extra.get("unusual_below")
        total_rows = sum(r.stop - r.start for r in rounds)
        for number, rnd in enumerate(progress(rounds, total=len(rounds),
                                              desc=f"rounds ({total_rows:,} rows)",
                                              unit="round")):
            self._check_stop()
            t = time.monotonic()
            labels = {}
            if stage is not None:
                labels = {p.file: self._labels_to(versions[p.file], below, stage)
                          for p in rnd.pieces if p.pass_no == last_pass}

            def submit(snapshot, attempt, rnd=rnd, number=number, labels=labels):
                return [self.client.submit(
                    piece_statistics, facts[p.file], p, rnd.stop, snapshot, self.settings,
                    labels.get(p.file) if p.pass_no == last_pass else None,
                    key=f"shoal-piece-{self.tag}-{number}-{i}-{attempt}")
                    for i, p in enumerate(rnd.pieces)]

            results: list[PieceResult] = self._broadcast_and_gather(mixture, submit)
            for p in rnd.pieces:
                f = facts[p.file]
                if stage is None or p.pass_no != last_pass or p.hi != f.valid_rows:
                    continue
                if p.lo == 0:   # the piece was the whole file and wrote its labels
                    written[p.file] = labels_name(f.name, f.digest,
                                                  self.settings.output.format)
                else:
                    written[p.file] = self._assemble(f, versions[p.file],
                                                     labels[p.file].unusual_below, stage)
            mixture = apply_round(mixture, [r.stats for r in results], rnd.start, rnd.stop,
                                  refresh=rnd.refresh)
            for r in results:   # the service's rule, piece by piece in stream order
                extra = self._add_counts(extra, mixture, r.counts)
                if below is not None:
                    n = r.stats.n_rows
                    below += n / (n + UNUSUAL_MEMORY_ROWS) * (r.log_density_quantile - below)
            log_event("backfill_round", logging.DEBUG, round=number, rows=rnd.stop - rnd.start,
                      pieces=len(rnd.pieces), refreshed=rnd.refresh, n_rows=rnd.stop,
                      duration=round(time.monotonic() - t, 4))
        if below is not None:
            extra["unusual_below"] = float(below)
        return mixture, extra

    def _labels_to(self, version: int, below: float | None, stage: Path) -> LabelsTo:
        return LabelsTo(version, -np.inf if below is None else float(below),
                        str(self.layout.outbox), str(stage), self._names(), self.schema)

    def _names(self) -> tuple:
        """The segments' names for the labels (read from the store when configured)."""
        if not self.settings.output.segment_names:
            return ()
        return tuple(sorted(segment_names(self.store.db).items()))

    def _assemble(self, f: FileFacts, version: int, below: float | None, stage: Path):
        return self.client.submit(assemble_labels, f, self.settings,
                                  self._labels_to(version, below, stage),
                                  key=f"shoal-labels-{self.tag}-{f.index}")

    def _relabel(self, files: list[FileFacts], mixture, version: int,
                 below: float) -> dict:
        """Futures of labels files written with the final model, by file index."""
        self._check_stop()
        if not files:
            return {}

        def submit(model, attempt):
            return [self.client.submit(label_file, f, self.settings, model, version, below,
                                       str(self.layout.outbox), self._names(), self.schema,
                                       key=f"shoal-labels-{self.tag}-{f.index}-{attempt}")
                    for f in files]

        return dict(zip([f.index for f in files], self._broadcast_and_gather(mixture, submit)))

    def _broadcast_and_gather(self, mixture, submit) -> list:
        """Broadcast ``mixture``, gather the futures ``submit(snapshot, attempt)`` makes.

        A snapshot lost with every worker that held it cancels its tasks; they are
        submitted again under new keys with a fresh broadcast (results are per piece, so
        nothing is counted twice).
        """
        for attempt in range(_ATTEMPTS):
            [snapshot] = self.client.scatter([mixture], broadcast=True, hash=False)
            futures = submit(snapshot, attempt)
            try:
                return self._gather(futures)
            except CancelledError as exc:
                if attempt + 1 == _ATTEMPTS:
                    raise BackfillError(f"the parameter snapshot was lost with the workers "
                                        f"{_ATTEMPTS} times in a row: {exc}") from exc
                self.broadcasts_again += 1
                log_event("backfill_snapshot_lost", logging.WARNING, attempt=attempt + 1,
                          detail=str(exc))
            finally:
                del futures, snapshot
        raise AssertionError("unreachable")

    def _commit(self, facts, learned, duplicates, refused, mixture, extra, version,
                clear_warmup, seen_at, labelled: bool) -> int:
        now = self.wall()
        outcome = {f.index: "committed" for f in learned}
        outcome.update({f.index: "duplicate" for f in duplicates})
        for f in refused:
            quarantine(Path(f.path), self.layout.quarantine, f.reason, f.detail, move=False,
                       now=now, facts={"digest": f.digest, "size": f.size,
                                       "digest_algorithm": f.digest_algorithm if f.digest
                                       else None})
            log_event("input_quarantined", logging.WARNING, file=f.name, reason=f.reason,
                      detail=f.detail)
        fmt = self.settings.output.format
        entries = []
        for f in facts:
            if f.reason is not None:
                entries.append((LedgerEntry(digest=f.digest, name=f.name, size=f.size,
                                            outcome="quarantined",
                                            reason=f"{f.reason}: {f.detail}",
                                            seen_at=seen_at, finished_at=now), False))
            elif f.index in outcome:
                entries.append((LedgerEntry(digest=f.digest, name=f.name, size=f.size,
                                            outcome=outcome[f.index], rows=f.rows,
                                            rows_invalid=f.rows_invalid,
                                            labels=labels_name(f.name, f.digest, fmt)
                                            if labelled else None,
                                            seen_at=seen_at, finished_at=now),
                                outcome[f.index] == "committed"))
        checkpoint = history = None
        if learned and mixture is not None:
            born = dict(extra.get("segment_born", {}))
            for sid in mixture.ids.tolist():
                born.setdefault(str(sid), {"version": version, "time": now})
            extra = dict(extra, segment_born=born)
            arrays, meta = mixture.to_state()
            checkpoint = Checkpoint(version, arrays, meta, extra)
            history = history_rows(mixture, extra)
        return _commit_all(self.store, entries, checkpoint, history or [], clear_warmup,
                           self.schema)


class _Slice:
    """Rows ``a..b`` of some scores (what :func:`save_scores` reads)."""

    def __init__(self, scores, a: int, b: int):
        self.segment = scores.segment[a:b]
        self.confidence = scores.confidence[a:b]
        self.log_density = scores.log_density[a:b]


def _commit_all(store: StateStore, entries: list[tuple[LedgerEntry, bool]],
                checkpoint: Checkpoint | None, history: list[HistoryRow],
                clear_warmup: bool, labels_schema: str | None = None) -> int:
    """Every ledger row, the checkpoint and its history in ONE transaction.

    The store has no public call for many inputs at once (``commit_input`` is one input
    per transaction), so this uses its row writers inside one of its transactions.
    """

    now = store.clock()
    with store._transaction():
        version = store.model_version
        for entry, learned in entries:
            if entry.outcome == "quarantined":
                store._insert_entry(entry)
                continue
            version += 1 if learned else 0
            store._insert_entry(entry, model_version=version)
        if checkpoint is not None and checkpoint.version != version:
            raise BackfillError(f"checkpoint version {checkpoint.version} does not match "
                                f"the ledger's {version}")
        store._set_meta("model_version", str(version))
        if clear_warmup:
            store.db.execute("DELETE FROM warmup")
            store.db.execute("DELETE FROM warmup_valid")
            store.db.execute("DELETE FROM warmup_duplicates")
        if checkpoint is not None:
            store._insert_checkpoint(checkpoint, now)
        store._insert_history(history, version, now)
        if labels_schema is not None:
            store.db.execute("INSERT OR IGNORE INTO meta (key, value) VALUES "
                             "('labels_schema', ?)", (labels_schema,))
    return version


# -- the command -------------------------------------------------------------------
def add_backfill_command(cmd, with_config, stop_on_signals) -> None:
    """Add ``backfill`` with the CLI's own ``cmd``/``with_config`` helpers."""
    sp = with_config(cmd("backfill", "learn a history of Parquet/CSV files on a Dask cluster "
                                     "into the state folder, labelling every row",
                         lambda args: _cmd_backfill(args, stop_on_signals)))
    sp.add_argument("sources", nargs="+", metavar="SOURCE",
                    help="files, or folders whose Parquet/CSV files are taken in name order")
    where = sp.add_mutually_exclusive_group()
    where.add_argument("--scheduler", metavar="ADDRESS",
                       help="address of a running Dask scheduler, e.g. tcp://host:8786")
    where.add_argument("--local-workers", type=int, metavar="N",
                       help="start N local worker processes (default: one per core)")
    sp.add_argument("--round-rows", type=int, default=DEFAULT_ROUND_ROWS, metavar="ROWS",
                    help="rows per round: one parameter snapshot per round, rounded up to "
                         f"whole refresh intervals (default {DEFAULT_ROUND_ROWS:,})")
    sp.add_argument("--labels", choices=LABEL_MODES, default="round",
                    help="round: each row labelled by the snapshot that scored it while "
                         "learning (one pass, as the service labels); final: every row "
                         "labelled again by the final model (a second pass)")
    sp.add_argument("--passes", type=int, default=1, metavar="N",
                    help="learn the history N times over (default 1); labels come from the "
                         "last pass")
    sp.add_argument("--connect-timeout", type=float, default=10.0, metavar="SECONDS",
                    help="give up on the scheduler after this long (default 10)")


def _cmd_backfill(args, stop_on_signals) -> int:
    from shoal.config import load_config
    from shoal.daemon.runtime.logs import setup_logging

    settings = load_config(args.config)
    setup_logging(settings.log_level)
    if args.local_workers is not None and args.local_workers < 1:
        raise UsageError(f"--local-workers should be at least 1, got {args.local_workers}")
    stop = threading.Event()
    with stop_on_signals(stop):
        r = backfill(settings, args.sources, scheduler=args.scheduler,
                     local_workers=args.local_workers, round_rows=args.round_rows,
                     labels=args.labels, passes=args.passes,
                     connect_timeout=args.connect_timeout, stop=stop)
    learned = f"{r.learned} files learned"
    if r.learned:
        learned += (f" ({r.warmup_rows:,} warm-up rows, {r.rows:,} rows in {r.rounds} rounds "
                    f"of {r.round_rows:,})")
    print(f"{learned}, {r.duplicates} duplicates, {r.skipped} already done, {r.quarantined} "
          f"quarantined; {len(r.labels)} labels files; model version {r.model_version}; "
          f"{r.seconds:.1f} s")
    return 1 if r.quarantined else 0
