"""The service's errors, and the one table of the ``shoal`` command's exit codes.

Every error derives from :class:`shoal.core.errors.ShoalError` and carries
``exit_code``; ``main()`` (:mod:`shoal.daemon.cli.main`) returns it, and nothing else
chooses an exit code. The table (a test keeps it and the classes in step):

- 0: done.
- 1: an input was quarantined (ingest), a model error, or another service failure
  (ShoalError, ModelError, ServiceError, BackfillError).
- 2: usage or configuration error (UsageError, ConfigError; argparse's usage errors).
- 3: the state folder or store cannot be used (StateError).
- 4: the Dask scheduler cannot be reached, or Dask is not installed (ClusterUnavailable,
  backfill).
- 130: stopped by a signal before finishing (Interrupted; ingest, label, backfill).
- 141: the reader of the output went away (a broken pipe, as SIGPIPE would end it).
"""
from __future__ import annotations

from shoal.core import ShoalError

__all__ = [
    "ServiceError",
    "UsageError",
    "StateError",
    "Interrupted",
    "InputRejected",
    "InputVanished",
    "InputRefused",
    "InputChanged",
]


class ServiceError(ShoalError):
    """Base of the service's errors (under the core's ``ShoalError``); ``exit_code`` is
    what ``main()`` returns."""

    exit_code = 1


class UsageError(ServiceError):
    """A command used wrongly (an option, a name, a range); exit code 2 with the message."""

    exit_code = 2


class StateError(ServiceError):
    """The state folder or store is unreadable, locked, or from an incompatible version."""

    exit_code = 3


class Interrupted(ServiceError):
    """A stop was requested; the input in progress is abandoned uncommitted."""

    exit_code = 130


class InputRejected(ServiceError):
    """A bad input: it is quarantined with ``reason`` (a short code) and ``detail``."""

    def __init__(self, reason: str, detail: str, **facts):
        super().__init__(f"{reason}: {detail}")
        self.reason = reason
        self.detail = detail
        self.facts = facts


class InputVanished(ServiceError):
    """The input disappeared between its event and its read; nothing to do."""


class InputRefused(ServiceError):
    """Not a regular file (symlink, FIFO, device, folder): never opened, left untouched."""


class InputChanged(ServiceError):
    """The input grew or was rewritten while it was read (a writer still at work): nothing
    of it is committed; it is taken again once settled."""
