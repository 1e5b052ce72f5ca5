"""The error hierarchy shared by every part of shoal.

The daemon subclasses :class:`ShoalError` for its own failures and maps the whole
hierarchy to exit codes in one place.
"""

__all__ = ["ShoalError", "ModelError", "NotEnoughDataError", "IllConditionedError"]


class ShoalError(Exception):
    """Base class of every error shoal raises on purpose."""


class ModelError(ShoalError, ValueError):
    """Arguments to the mixture core have the wrong shape, type or value."""


class NotEnoughDataError(ModelError):
    """Too few rows, or too few distinct rows, for the requested number of segments."""


class IllConditionedError(ModelError):
    """A covariance cannot be factorised even after regularisation."""
