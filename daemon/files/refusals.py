"""Why an input is refused: reader errors as reason codes, and the checks every format shares.

Each refusal is an :class:`~shoal.daemon.errors.InputRejected` with a reason code and
a detail that names the column or line, so the quarantine note says what to fix. The
CSV and Parquet readers and the frame all raise through these helpers, so a reason
code means the same whatever the format.
"""
from __future__ import annotations

import re

import pyarrow as pa

from shoal.config import Settings
from shoal.daemon.errors import InputRejected

__all__ = ["explain_reader_error", "too_much_data", "check_columns", "guard_batches"]


def too_much_data(n: int, settings: Settings, where: str = "") -> InputRejected:
    limit = settings.limits.max_data_bytes
    return InputRejected("too_much_data", f"{n} bytes of data{where}, more than "
                         f"limits.max_data_bytes={limit}", limit=limit)


def check_columns(names: list[str], settings: Settings) -> None:
    present = set(names)
    for name in settings.columns:
        if name not in present:
            role = "feature" if name in settings.features else "passthrough"
            shown = ", ".join(repr(n) for n in names[:20]) + (" ..." if len(names) > 20 else "")
            raise InputRejected("missing_column",
                                f"{role} column {name!r} is missing; the input has {shown}",
                                column=name)
    seen: set[str] = set()
    dupes = sorted({n for n in names if n in settings.columns and (n in seen or seen.add(n))})
    if dupes:
        raise InputRejected("duplicate_column", f"column {dupes[0]!r} appears more than once",
                            column=dupes[0])


_ROW_WIDTH = re.compile(r"Row #(\d+): Expected (\d+) columns, got (\d+)")
_CONVERT = re.compile(r"In CSV column #(\d+): Row #(\d+): CSV conversion error to (\w+): (.*)")


def guard_batches(batches, kind: str):
    """Re-raise reader errors met while iterating as InputRejected."""
    it = iter(batches)
    while True:
        try:
            batch = next(it)
        except StopIteration:
            return
        except InputRejected:
            raise
        except (pa.ArrowException, OSError, EOFError, ValueError) as exc:
            raise explain_reader_error(exc, kind) from exc
        yield batch


def explain_reader_error(exc: Exception, kind: str, header: list[str] | None = None) -> InputRejected:
    """A reader error as a reason code and a detail that names the line or column."""
    msg = str(exc)
    if kind.startswith(("csv", "tsv")):
        m = _ROW_WIDTH.search(msg)
        if m:
            line, want, got = (int(g) for g in m.groups())
            return InputRejected("bad_row", f"line {line}: expected {want} fields, found {got}",
                                 line=line)
        m = _CONVERT.search(msg)
        if m:
            idx, line, target, what = int(m.group(1)), int(m.group(2)), m.group(3), m.group(4)
            col = header[idx] if header and idx < len(header) else f"#{idx}"
            if "UTF8" in what:
                return InputRejected("encoding", f"line {line}, column {col!r}: not UTF-8",
                                     line=line, column=col)
            return InputRejected("non_numeric_feature" if target == "double" else "bad_value",
                                 f"line {line}, column {col!r}: {what}, expected a number",
                                 line=line, column=col)
        if isinstance(exc, (OSError, EOFError)) and kind.endswith(".gz"):
            return InputRejected("bad_compression", f"cannot be decompressed: {msg}")
        if "UTF8" in msg or "UTF-8" in msg:
            return InputRejected("encoding", f"not UTF-8: {msg}")
        return InputRejected("bad_csv", msg)
    return InputRejected("bad_parquet", f"Parquet data cannot be read: {msg}")
