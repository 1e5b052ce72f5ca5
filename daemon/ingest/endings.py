"""How an input's processing ends besides its commit: labels metadata, the sidecar of
skipped rows, and the quarantine of an input that failed.

An input refused for its own sake (unreadable, empty, too large, a model update it
breaks) is moved aside with a JSON sidecar saying why and recorded in the ledger in
its own transaction (:func:`quarantine_input`); the loop goes on with the next.
"""
from __future__ import annotations

import json
import logging
import traceback
from pathlib import Path

from shoal.daemon.errors import InputRejected
from shoal.daemon.files.labels_schema import LABELS_SCHEMA_VERSION
from shoal.daemon.files.layout import Layout
from shoal.daemon.files.quarantine import quarantine
from shoal.daemon.files.writer import atomic_file, display_name
from shoal.daemon.runtime.logs import log_event
from shoal.daemon.state.store import LedgerEntry, StateStore

__all__ = ["labels_metadata", "note_skipped", "quarantine_input", "UNEXPECTED_REASONS"]

# Quarantine reasons of failures nobody foresaw (logged with their traceback).
UNEXPECTED_REASONS = ("unreadable", "internal_error")


def labels_metadata(digest: str, algorithm: str, name: str, version: int | None) -> dict:
    """The ``shoal.*`` keys of a labels file's metadata."""
    return {"input_digest": digest, "digest_algorithm": algorithm, "input_name": name,
            "model_version": version, "labels_schema_version": LABELS_SCHEMA_VERSION}


def note_skipped(labels: Path, name: str, lines: list[int], sync_folder: bool) -> int:
    """The lines of rows skipped (``input.bad_rows: skip``) in a sidecar next to the
    labels (``_<labels file>.bad_rows.json``, written before the commit: the leading
    ``_`` keeps dataset readers, pyarrow's among them, from taking it for data) and a
    log line; returns how many."""
    lines = list(lines)
    sidecar = labels.with_name(f"_{labels.name}.bad_rows.json")
    with atomic_file(sidecar, sync_folder=sync_folder) as f:
        f.write(json.dumps({"input": name, "labels": labels.name, "rows_skipped":
                            len(lines), "lines": lines}).encode())
    log_event("rows_skipped", logging.WARNING, file=name, rows=len(lines),
              lines=lines[:20], sidecar=sidecar.name)
    return len(lines)


def quarantine_input(store: StateStore, layout: Layout, path: Path, name: str,
                     in_inbox: bool, exc: InputRejected, seen_at: float, now: float,
                     attempt: str | None, duration: float) -> bool:
    """Move ``path`` to the quarantine folder (``in_inbox``; else a sidecar only), record
    it in the ledger, log it. Returns whether the failure was unforeseen (the model's
    objects may have changed part-way: the caller takes the state again)."""
    facts = {k: v for k, v in exc.facts.items()}
    sidecar = quarantine(path, layout.quarantine, exc.reason, exc.detail,
                         move=in_inbox, now=now, facts=facts)
    store.record_quarantine(LedgerEntry(
        digest=facts.get("digest"), name=name, size=int(facts.get("size", 0) or 0),
        outcome="quarantined", reason=f"{exc.reason}: {exc.detail}", seen_at=seen_at,
        finished_at=now), attempt=attempt)
    cause = exc.__cause__
    log_event("input_quarantined", logging.WARNING, file=name, reason=exc.reason,
              detail=exc.detail, sidecar=display_name(sidecar.name),
              duration=round(duration, 4),
              traceback=None if cause is None or exc.reason not in UNEXPECTED_REASONS else
              "".join(traceback.format_exception(cause)))
    return exc.reason in UNEXPECTED_REASONS

