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

The plan (:mod:`.plan`), the workers' tasks (:mod:`.tasks`), the cluster
(:mod:`.cluster`) and the command line (:mod:`.command`) are modules of their own;
Dask's ``distributed`` is imported only in :mod:`.cluster`.
"""
from __future__ import annotations

import logging
import shutil
import threading
import time
import uuid
from concurrent.futures import CancelledError
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from shoal.config import Settings
from shoal.core import kernel_check
from shoal.core.distributed import apply_round
from shoal.daemon.backfill.cluster import cluster_client
from shoal.daemon.backfill.commit import commit_history
from shoal.daemon.backfill.plan import (
    DEFAULT_ROUND_ROWS,
    LABEL_MODES,
    BackfillError,
    ClusterUnavailable,
    FileFacts,
    Round,
    list_sources,
    plan_rounds,
    round_size,
)
from shoal.daemon.backfill.tasks import (
    LabelsTo,
    PieceResult,
    ScoreSlice,
    assemble_labels,
    head_rows,
    label_file,
    piece_statistics,
    save_scores,
    survey_file,
)
from shoal.daemon.errors import Interrupted, UsageError
from shoal.daemon.files.layout import Layout, StateLock, prepare_folders, remove_stale_temps
from shoal.daemon.files.writer import labels_name
from shoal.daemon.ingest.learning import UNUSUAL_MEMORY_ROWS, warm_up
from shoal.daemon.ingest.results import ModelState, load_model_state
from shoal.daemon.model.contract import open_model_store
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.runtime.progress import progress
from shoal.daemon.segments.segment_names import segment_names
from shoal.daemon.state.store import StateStore

__all__ = ["backfill", "BackfillReport", "BackfillRun", "BackfillError", "ClusterUnavailable",
           "plan_rounds", "DEFAULT_ROUND_ROWS"]

_ATTEMPTS = 3               # broadcasts of one snapshot before a round gives up
_STAGE = ".shoal-backfill"   # in the outbox: the rounds' scores until the labels are written


def first_model_version(learned: list[FileFacts], warmup_rows: int,
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
    """What a backfill did: files taken, learned, duplicated, skipped (already done) and
    quarantined; the rows learned in rounds and at the warm-up, the rounds and their
    size, snapshots broadcast again, the model version committed, the labels files
    written and the seconds it took."""

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
            state = load_model_state(settings, store)
            kernel_check.warm()   # the compiled kernels checked before any work is sent
            if client is not None:
                return BackfillRun(settings, layout, store, state, client, stop, wall).run(
                    paths, round_rows, labels, passes)
            with cluster_client(scheduler, local_workers, connect_timeout) as made:
                return BackfillRun(settings, layout, store, state, made, stop, wall).run(
                    paths, round_rows, labels, passes)
        finally:
            store.close()


class BackfillRun:
    """One backfill on one cluster, from the model ``state`` the store holds: the survey,
    the warm-up, the rounds, the labels and the ONE commit (:meth:`run`). The
    coordinator owns the model; workers read the files."""

    def __init__(self, settings, layout: Layout, store: StateStore, state: ModelState,
                 client, stop: threading.Event, wall):
        self.settings, self.layout, self.store = settings, layout, store
        self.state, self.client, self.stop, self.wall = state, client, stop, wall
        self.tag = uuid.uuid4().hex[:12]   # task keys of this run
        self.schema: str | None = None     # the stream's pass-through types (labels_schema)
        self.broadcasts_again = 0

    def _check_stop(self) -> None:
        if self.stop.is_set():
            raise Interrupted("stop requested; nothing was committed")

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
        st = self.state
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
                first = first_model_version(learned, skip, versions) if clear_warmup \
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
        st = self.state
        buffered = 0 if st.warmup is None else len(st.warmup)
        need = max(self.settings.warmup_rows - buffered, 0)
        fut = self.client.submit(head_rows, learned, self.settings, need,
                                 key=f"shoal-head-{self.tag}")
        head = self._gather([fut])[0]
        if len(head) < need:
            raise BackfillError(f"the history holds {buffered + len(head)} valid rows; the "
                                f"warm-up needs warmup_rows={self.settings.warmup_rows}")
        mixture, scores, _, init_extra = warm_up(self.settings, head, st.warmup,
                                                 self.stop)
        if mixture is None:
            raise BackfillError("the warm-up rows could not start a model (see the "
                                "warmup_not_enough_data log line)")
        extra = dict(self.state.extra)
        extra.update(init_extra)
        extra = self._count(extra, mixture, scores.component)
        if stage is not None:   # the warm-up rows are labelled by the first model
            at = 0
            for f in learned:
                take = min(f.valid_rows, need - at)
                if take <= 0:
                    break
                save_scores(stage, f.index, 0, ScoreSlice(scores, at, at + take))
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
        return commit_history(self.settings, self.layout, self.store, facts, learned,
                              duplicates, refused, mixture, extra, version, clear_warmup,
                              seen_at, self.wall(), labelled, self.schema)
