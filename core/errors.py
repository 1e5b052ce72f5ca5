"""The root of the error hierarchy shared by every part of shoal.

Every error the package raises on purpose derives from :class:`ShoalError`: the
core's model errors here, the configuration's ``ConfigError``, and the service's
errors (delivery and backfill included) in :mod:`shoal.daemon.errors`. Each class
carries ``exit_code``, what the ``shoal`` command returns for it; the table of exit
codes is in :mod:`shoal.daemon.errors`.
"""

__all__ = ["ShoalError", "ModelError", "NotEnoughDataError", "IllConditionedError"]


class ShoalError(Exception):
    """Base class of every error shoal raises on purpose.

    Attributes
    ----------
    exit_code : int
        What the ``shoal`` command returns for it: 1 unless a subclass says otherwise.
    """

    exit_code = 1


class ModelError(ShoalError, ValueError):
    """Arguments to the mixture core have the wrong shape, type or value."""


class NotEnoughDataError(ModelError):
    """Too few rows, or too few distinct rows, for the requested number of segments."""


class IllConditionedError(ModelError):
    """A covariance cannot be factorised even after regularisation."""
