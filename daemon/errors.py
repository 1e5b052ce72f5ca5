"""The service's errors. ``main()`` turns them into exit codes in one place.

Exit codes: 0 success; 1 some input was quarantined, or a model error;
2 usage or configuration error (:class:`shoal.config.ConfigError`);
3 the state store cannot be used; 130 stopped by a signal before finishing.
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
