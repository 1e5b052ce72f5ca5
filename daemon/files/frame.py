"""The frame: one block of an input's rows as the model takes them, and its validation.

A :class:`Frame` holds the feature matrix (row-major float64, NaN where null), the
pass-through columns and which rows are valid. :func:`build_frame` makes one from
Arrow record batches, checking every feature value as it is copied: null, NaN,
infinite, past :data:`FEATURE_BOUND`, or outside the model's range marks the row
invalid, never the file. The CSV and Parquet readers give record batches; this
module knows nothing of file formats.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from shoal.config import Settings
from shoal.core import fused
from shoal.daemon.files.refusals import explain_reader_error

__all__ = ["Frame", "BATCH_ROWS", "FEATURE_BOUND", "build_frame", "split_batches",
           "decoded_bytes", "decode_dictionaries", "plain_field"]

BATCH_ROWS = 65536
FEATURE_BOUND = 1e50


@dataclass
class Frame:
    """A block of an input's rows: the feature matrix, the pass-through columns, which
    rows are valid, and what the validation and the transforms found about them."""
    features: np.ndarray      # (n_rows, n_features) float64; NaN where null
    passthrough: pa.Table     # (n_rows,) the pass-through columns
    valid: np.ndarray         # (n_rows,) bool: all features finite and within FEATURE_BOUND
    # (and within model_range when the frame was read with one)
    model_range: tuple[np.ndarray, np.ndarray] | None = None   # (center, limit) checked
    beyond_range: int = 0     # rows refused by model_range alone (finite, within the bound)
    # set by shoal.daemon.model.transforming when features are transformed:
    log_jacobian: np.ndarray | None = None   # (n_rows,) of the transforms, 0 where invalid
    outside_domain: int = 0   # rows refused for a value outside a transform's domain
    observed: np.ndarray | None = None   # (n_rows,) features present per row, once counted

    @property
    def n_rows(self) -> int:
        return int(self.features.shape[0])

    @property
    def n_invalid(self) -> int:
        return int(self.n_rows - np.count_nonzero(self.valid))


def split_batches(batches: list[pa.RecordBatch], rows: int):
    """The first ``rows`` rows of ``batches`` and the rest, as two lists of batches."""
    head: list[pa.RecordBatch] = []
    for i, batch in enumerate(batches):
        if batch.num_rows >= rows:
            head.append(batch.slice(0, rows))
            rest = [batch.slice(rows)] if batch.num_rows > rows else []
            return head, rest + batches[i + 1:]
        head.append(batch)
        rows -= batch.num_rows
    return head, []


_FILL_ROWS = 4096   # rows of the feature matrix filled at a time (they stay in cache)


def build_frame(batches: list[pa.RecordBatch], settings: Settings, pass_schema: pa.Schema,
           model_range: tuple[np.ndarray, np.ndarray] | None = None) -> Frame:
    """One frame from record batches. Feature values past +-1e50 are refused like NaN
    (squares of their log-densities, in the drift statistics, would overflow), and with
    ``model_range`` values further than ``limit`` from ``center``. The columns are viewed
    on their Arrow buffers (not copied, where float64) and copied into the row-major
    feature matrix, in one compiled pass where the core's kernels are built."""
    n = sum(b.num_rows for b in batches)
    names = settings.features
    columns = []
    for name in names:
        parts = [_feature_values(batch.column(name)) for batch in batches]
        columns.append(parts[0] if len(parts) == 1 else np.concatenate(parts))
    features = np.empty((n, len(names)))
    valid = np.empty(n, dtype=bool)
    if fused.enabled():
        # one compiled pass: checks column by column, copy row by row (a few times
        # quicker than the numpy passes below, which each go over the data again)
        center = limit = None
        if model_range is not None:
            center, limit = (np.ascontiguousarray(a, dtype=np.float64) for a in model_range)
        fused.kernels().rows_from_columns(columns, features, FEATURE_BOUND, center, limit,
                                          valid)
    else:
        _fill_checked(columns, features, valid, model_range)
    beyond = 0
    if model_range is not None and not valid.all():
        refused = features[~valid]
        with np.errstate(invalid="ignore"):
            beyond = int(np.count_nonzero(np.all(np.abs(refused) <= FEATURE_BOUND, axis=1)))
    passes = [b.select(list(settings.passthrough)) for b in batches]
    return Frame(features=features,
                 passthrough=pa.Table.from_batches(passes, schema=pass_schema), valid=valid,
                 model_range=model_range, beyond_range=beyond)


def _fill_checked(columns: list[np.ndarray], features: np.ndarray, valid: np.ndarray,
                  model_range: tuple[np.ndarray, np.ndarray] | None) -> None:
    """``features`` from ``columns`` and ``valid`` from their bounds, in numpy. Where the
    range lies well inside +-1e50 it implies the bound, which is then not checked again;
    the matrix is filled in blocks of rows that stay in cache (a transposing copy of a
    whole (features, rows) matrix would leave the cache between columns)."""
    n = len(valid)
    valid[:] = True
    scratch = np.empty(n)
    implied = np.zeros(len(columns), dtype=bool)
    if model_range is not None:
        center, limit = model_range
        implied = np.abs(center) + limit <= FEATURE_BOUND / 2
    for j, values in enumerate(columns):
        if not implied[j]:
            np.abs(values, out=scratch)
            valid &= scratch <= FEATURE_BOUND   # False for NaN
        if model_range is not None:
            np.subtract(values, center[j], out=scratch)
            np.abs(scratch, out=scratch)
            valid &= scratch <= limit[j]
    for lo in range(0, n, _FILL_ROWS):
        block = features[lo:lo + _FILL_ROWS]
        for j, values in enumerate(columns):
            block[:, j] = values[lo:lo + _FILL_ROWS]


def _feature_values(col: pa.Array) -> np.ndarray:
    """A feature column as float64 values, nulls as NaN, viewed without a copy where it
    can be. (Not ``Array.to_numpy``: on record batches read from Parquet its first call
    imports pandas, which costs more than reading a small input.)"""
    if col.type != pa.float64():
        col = col.cast(pa.float64(), safe=False)  # integers past 2**53 round
    if col.null_count:
        col = pc.fill_null(col, np.nan)
    return np.frombuffer(col.buffers()[1], dtype=np.float64, count=len(col),
                         offset=col.offset * 8)


def decoded_bytes(batch: pa.RecordBatch) -> int:
    """Bytes ``batch`` takes once its dictionary columns are decoded (counted, not done)."""
    total = 0
    for col in batch.columns:
        if pa.types.is_dictionary(col.type) and (pa.types.is_string(col.type.value_type)
                                                 or pa.types.is_binary(col.type.value_type)):
            try:
                lengths = pc.take(pc.binary_length(col.dictionary), col.indices)
            except (pa.ArrowIndexError, pa.ArrowInvalid) as exc:  # an index past the
                raise explain_reader_error(exc, "parquet") from exc              # dictionary (damaged)
            total += int(pc.sum(lengths).as_py() or 0) + 4 * (len(col) + 1)
        else:
            total += col.nbytes
    return total


def decode_dictionaries(batch: pa.RecordBatch) -> pa.RecordBatch:
    if not any(pa.types.is_dictionary(t) for t in batch.schema.types):
        return batch
    cols = [c.dictionary_decode() if pa.types.is_dictionary(c.type) else c
            for c in batch.columns]
    return pa.RecordBatch.from_arrays(cols, names=batch.schema.names)


def plain_field(field: pa.Field) -> pa.Field:
    return field.with_type(field.type.value_type) if pa.types.is_dictionary(field.type) \
        else field
