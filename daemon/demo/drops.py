"""Drops into an inbox as a producer should make them: written beside the inbox, then
renamed in, so that the service never meets a half-written file."""
from __future__ import annotations

import os
from pathlib import Path

import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

__all__ = ["MTIME_BASE", "write_drop"]

# Drops get modification times from this fixed past epoch on, one second apart, so
# that the order the service takes them in (oldest first) is the order they were made.
MTIME_BASE = 1_600_000_000


def write_drop(table: pa.Table, inbox: Path, name: str, index: int | None = None) -> Path:
    """Write ``table`` beside the inbox and rename it in (CSV or Parquet by suffix)."""
    staging = inbox.parent / (inbox.name + ".staging")
    staging.mkdir(exist_ok=True)
    tmp = staging / name
    if name.endswith(".parquet"):
        pq.write_table(table, tmp)
    else:
        pacsv.write_csv(table, tmp)
    if index is not None:
        os.utime(tmp, ns=((MTIME_BASE + index) * 10**9,) * 2)
    target = inbox / name
    os.rename(tmp, target)
    return target
