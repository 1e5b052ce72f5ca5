"""The backfill's commit: every file's ledger row, the final checkpoint and its segment
history in ONE state-store transaction.

Refused files get their quarantine sidecar (the file stays where it is) and a
ledger row; learned files advance the model version by one each, as the service
counts them; duplicates are labelled, not learned. ``shoal watch`` on the same state
continues from there and never takes those files again.
"""
from __future__ import annotations

import logging
from pathlib import Path

from shoal.config import Settings
from shoal.daemon.backfill.plan import FileFacts
from shoal.daemon.files.layout import Layout
from shoal.daemon.files.quarantine import quarantine
from shoal.daemon.files.writer import labels_name
from shoal.daemon.ingest.learning import history_rows
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.state.store import Checkpoint, HistoryRow, LedgerEntry, StateStore

__all__ = ["commit_history", "commit_all"]


def commit_history(settings: Settings, layout: Layout, store: StateStore,
                   facts: list[FileFacts], learned: list[FileFacts],
                   duplicates: list[FileFacts], refused: list[FileFacts], mixture,
                   extra: dict, version: int, clear_warmup: bool, seen_at: float,
                   now: float, labelled: bool, schema: str | None) -> int:
    """Quarantine ``refused`` (sidecars only) and commit every file of ``facts`` with the
    model ``mixture`` at ``version``; returns the model version committed."""
    outcome = {f.index: "committed" for f in learned}
    outcome.update({f.index: "duplicate" for f in duplicates})
    for f in refused:
        quarantine(Path(f.path), layout.quarantine, f.reason, f.detail, move=False,
                   now=now, facts={"digest": f.digest, "size": f.size,
                                   "digest_algorithm": f.digest_algorithm if f.digest
                                   else None})
        log_event("input_quarantined", logging.WARNING, file=f.name, reason=f.reason,
                  detail=f.detail)
    fmt = settings.output.format
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
    return commit_all(store, entries, checkpoint, history or [], clear_warmup, schema)


def commit_all(store: StateStore, entries: list[tuple[LedgerEntry, bool]],
               checkpoint: Checkpoint | None, history: list[HistoryRow],
               clear_warmup: bool, labels_schema: str | None = None) -> int:
    """Every ledger row, the checkpoint and its history in ONE transaction
    (:meth:`StateStore.commit_many`)."""
    return store.commit_many(entries, checkpoint, history, clear_warmup, labels_schema)
