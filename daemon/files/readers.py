"""Read an input into frames: the entry point ingest, backfill and the views call.

:func:`iter_frames` picks the format's reader (:mod:`.csv_input`, :mod:`.parquet_input`),
checks the row and byte limits as record batches arrive, and cuts them into
:class:`~shoal.daemon.files.frame.Frame` blocks of a fixed number of rows, so memory
stays bounded and the cut does not depend on how the file was written. Anything that
makes the file unusable raises :class:`InputRejected` with a reason code and a detail
that names the column or line; rows whose features are null, NaN or infinite are only
marked (``Frame.valid``). The names other packages use are re-exported here.
"""
from __future__ import annotations

import io
from typing import BinaryIO, Callable, Iterator

import numpy as np
import pyarrow as pa

from shoal.config import Settings
from shoal.daemon.errors import InputRejected, Interrupted
from shoal.daemon.files.csv_input import InflateGuard, csv_batches
from shoal.daemon.files.digest import file_digest
from shoal.daemon.files.frame import (
    BATCH_ROWS,
    FEATURE_BOUND,
    Frame,
    build_frame,
    decode_dictionaries,
    decoded_bytes,
    plain_field,
    split_batches,
)
from shoal.daemon.files.parquet_input import parquet_batches
from shoal.daemon.files.prefetch import prefetch
from shoal.daemon.files.refusals import guard_batches, too_much_data

__all__ = ["Frame", "read_input", "iter_frames", "prefetch", "file_digest", "BATCH_ROWS",
           "FEATURE_BOUND", "InputRejected"]

# Record batches held for one frame are joined once this many are held (a file of tiny
# row groups would otherwise hold 65,536 one-row batches, each a few objects).
_HELD_BATCHES = 256


def read_input(f: BinaryIO, kind: str, settings: Settings,
               should_stop: Callable[[], bool] = lambda: False,
               skipped: list[int] | None = None) -> Frame:
    """Read an open input file of ``kind`` (``parquet``/``csv``/``csv.gz``/``tsv``...)
    whole (``skipped``: see :func:`iter_frames`)."""
    frames = list(iter_frames(f, kind, settings, should_stop, skipped=skipped))
    if len(frames) == 1:
        return frames[0]
    return Frame(features=np.concatenate([fr.features for fr in frames]),
                 passthrough=pa.concat_tables([fr.passthrough for fr in frames]),
                 valid=np.concatenate([fr.valid for fr in frames]))


def iter_frames(f: BinaryIO, kind: str, settings: Settings,
                should_stop: Callable[[], bool] = lambda: False,
                rows: int = BATCH_ROWS,
                model_range: tuple[np.ndarray, np.ndarray] | None = None,
                skipped: list[int] | None = None) -> Iterator[Frame]:
    """Read an open input file of ``kind`` as frames of ``rows`` rows (the last one may be
    shorter), whatever record batches the file holds, so that memory stays bounded and
    the cut does not depend on how the file was written.

    ``model_range`` ``(center, limit)``, arrays of shape (n_features,): rows with a
    feature ``x`` where ``|x - center| > limit`` are invalid too (checked as the values
    are copied, in the same pass as the finite check).

    Limits are checked as the batches arrive: a file past one raises
    :class:`InputRejected` part-way, after frames before it were yielded. Any other
    failure of reading (a parser's error nobody foresaw) is :class:`InputRejected` too,
    reason ``unreadable``; an ``OSError`` of the file itself is raised as it is.

    ``skipped``: a list that gets the line numbers of CSV rows left out under
    ``input.bad_rows: skip`` (without it, such a row refuses the input).
    """
    try:
        yield from _iter_frames(f, kind, settings, should_stop, rows, model_range, skipped)
    except (InputRejected, Interrupted, OSError):
        raise
    except Exception as exc:
        raise InputRejected("unreadable", f"{type(exc).__name__}: {exc}",
                            exception=type(exc).__name__) from exc


def _iter_frames(f: BinaryIO, kind: str, settings: Settings, should_stop: Callable[[], bool],
                 rows: int, model_range: tuple[np.ndarray, np.ndarray] | None,
                 skipped: list[int] | None = None) -> Iterator[Frame]:
    if kind == "parquet":
        batches, schema = parquet_batches(f, settings)
    elif kind in ("csv", "tsv"):
        size = f.seek(0, io.SEEK_END)
        f.seek(0)
        if size > settings.limits.max_data_bytes:
            raise too_much_data(size, settings)
        batches, schema = csv_batches(f, settings, kind == "tsv", skipped)
    elif kind in ("csv.gz", "tsv.gz"):
        batches, schema = csv_batches(io.BufferedReader(InflateGuard(f, settings), 1 << 16),
                                       settings, kind == "tsv.gz", skipped)
    else:
        raise InputRejected("unsupported_type", f"unsupported input type {kind!r}")
    pass_schema = pa.schema([plain_field(schema.field(c)) for c in settings.passthrough])
    held: list[pa.RecordBatch] = []
    n_held = n = decoded = 0
    limit = settings.limits.max_rows
    for batch in guard_batches(batches, kind):
        if should_stop():
            raise Interrupted("stop requested while reading")
        n += batch.num_rows
        if n > limit:
            raise InputRejected("too_many_rows", f"more than limits.max_rows={limit} rows",
                                limit=limit)
        decoded += decoded_bytes(batch)
        if decoded > settings.limits.max_data_bytes:
            raise too_much_data(decoded, settings, " once decoded")
        held.append(decode_dictionaries(batch))
        n_held += batch.num_rows
        if len(held) >= _HELD_BATCHES and n_held < rows:
            held = pa.Table.from_batches(held).combine_chunks().to_batches()
        while n_held >= rows:
            take, held = split_batches(held, rows)
            n_held -= rows
            yield build_frame(take, settings, pass_schema, model_range)
    if n == 0:
        raise InputRejected("no_rows", "the input has no data rows")
    if n_held:
        yield build_frame(held, settings, pass_schema, model_range)
