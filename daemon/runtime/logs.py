"""Logs: one JSON object per line on stderr.

Every record has ``time``, ``level`` and ``event``; the rest are the fields
given to :func:`log_event` (``file``, ``rows``, ``duration``,
``model_version`` ...).
"""
from __future__ import annotations

import datetime as _dt
import json
import logging
import sys
import warnings
from typing import Any, TextIO

__all__ = ["LOGGER_NAME", "JsonLineFormatter", "setup_logging", "log_event"]

LOGGER_NAME = "shoal"
_log = logging.getLogger(LOGGER_NAME)


class JsonLineFormatter(logging.Formatter):
    """A log record as one JSON object: ``time`` (UTC, milliseconds), ``level``, ``event``
    and the record's fields, so log lines can be filtered by machine."""

    def format(self, record: logging.LogRecord) -> str:
        out: dict[str, Any] = {
            "time": _dt.datetime.fromtimestamp(record.created, _dt.timezone.utc)
            .isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "event": getattr(record, "event", None) or record.getMessage(),
        }
        out.update(getattr(record, "fields", {}))
        if record.exc_info and record.exc_info[1] is not None:
            out["error"] = f"{type(record.exc_info[1]).__name__}: {record.exc_info[1]}"
        return json.dumps(out, default=str, ensure_ascii=False)


def setup_logging(level: str = "info", stream: TextIO | None = None) -> None:
    """Send the ``shoal`` logger's records to ``stream`` (stderr) as JSON lines.

    Python warnings (e.g. from the numeric core) are routed into the same log as
    ``python_warning`` events.
    """
    handler = logging.StreamHandler(stream or sys.stderr)
    handler.setFormatter(JsonLineFormatter())
    for old in list(_log.handlers):
        _log.removeHandler(old)
    _log.addHandler(handler)
    _log.setLevel(level.upper())
    _log.propagate = False
    warnings.showwarning = _warning_event
    for other in ("py.warnings", "watchdog"):  # library messages as JSON lines too
        lib_log = logging.getLogger(other)
        for old in list(lib_log.handlers):
            lib_log.removeHandler(old)
        lib_log.addHandler(handler)
        lib_log.setLevel(logging.WARNING)
        lib_log.propagate = False


def _warning_event(message, category, filename, lineno, file=None, line=None) -> None:
    """A Python warning as the log event ``python_warning`` (its category, text and the
    source line that raised it as fields), not as a record named by its text."""
    log_event("python_warning", logging.WARNING, category=category.__name__,
              message=str(message), source=f"{filename}:{lineno}")


def log_event(event: str, level: int = logging.INFO, **fields: Any) -> None:
    """Log ``event`` with ``fields``; fields that are None are left out."""
    if _log.isEnabledFor(level):
        clean = {k: v for k, v in fields.items() if v is not None}
        _log.log(level, event, extra={"event": event, "fields": clean})
