"""Labels with the current model, nothing learned or committed (``shoal label``).

:func:`label_with_model` reads an input through the same stages as ingest (read,
rows admitted, beyond-range rows marked invalid), scores it with the model as it
stands and writes the labels file atomically, its metadata giving the input's
content digest in the state store's algorithm.
"""
from __future__ import annotations

import os
import threading
from pathlib import Path
from typing import Callable, Iterable

import pyarrow as pa

from shoal.config import Settings
from shoal.daemon.errors import InputRejected, StateError
from shoal.daemon.files.digest import digest_file
from shoal.daemon.files.gaps import Unusual
from shoal.daemon.files.labels_schema import Conformer
from shoal.daemon.files.writer import LabelsFile, display_name
from shoal.daemon.files.opening import open_input
from shoal.daemon.ingest.endings import labels_metadata
from shoal.daemon.ingest.learning import observed_floor
from shoal.daemon.ingest.results import ModelState, Result
from shoal.daemon.ingest.rows import RowCount
from shoal.daemon.ingest.stages import read_frames, scored_tables
from shoal.daemon.intake.gate import input_kind
from shoal.daemon.state.store import StateStore

__all__ = ["label_with_model"]


def label_with_model(settings: Settings, store: StateStore, state: ModelState,
                     stream_schema: pa.Schema | None, path: Path, out: Path,
                     stop: threading.Event, threaded_bytes: int,
                     named: Callable[[Iterable[pa.Table]], Iterable[pa.Table]]) -> Result:
    """Label ``path`` with ``state``'s model into ``out`` (CSV if its name ends in
    ``.csv``, else Parquet); inputs of ``threaded_bytes`` and more are read in a
    thread. Raises :class:`StateError` without a model yet."""
    st = state
    if st.mixture is None:
        raise StateError("no model yet: the warm-up has not finished "
                         f"({0 if st.warmup is None else len(st.warmup)} of "
                         f"{settings.warmup_rows} rows buffered)")
    kind = input_kind(path.name)
    if kind is None:
        raise InputRejected("unsupported_type", "expected a name ending in .csv, .csv.gz, "
                            ".tsv, .tsv.gz, .parquet or .pq")
    fmt = "csv" if out.name.lower().endswith(".csv") else "parquet"
    count = RowCount()
    algorithm = store.digest_algorithm
    with open_input(path) as f:
        digest = digest_file(f, algorithm)
        conformer = Conformer(stream_schema, kind, dict(settings.passthrough_types))
        with read_frames(f, kind, settings, st, conformer, [], stop,
                         os.fstat(f.fileno()).st_size >= threaded_bytes) as frames:
            tables = named(scored_tables(
                count.counted(frames, st.mixture, observed_floor(settings)),
                st.mixture, Unusual.from_extra(st.extra), st.version))
            with LabelsFile(out, fmt, threaded=frames.threaded) as written:
                written.write_all(tables)
                written.keep(labels_metadata(digest, algorithm, display_name(path.name),
                                             st.version))
    return Result("labelled", display_name(path.name), count.rows, count.invalid, out,
                  model_version=st.version, rows_outside_domain=count.outside)
