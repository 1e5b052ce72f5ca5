"""shoal.core: the numbers. Mixture maths, stepwise EM and drift statistics.

This package imports numpy and scipy only: no files, no clock, no logging set-up.
"""

from .covariance import COVARIANCE_TYPES
from .errors import IllConditionedError, ModelError, NotEnoughDataError, ShoalError
from .mixture import FORMAT_VERSION, Mixture, Scores
from .schedule import StepSchedule, floor_from_half_life
from .transforms import TRANSFORMS, FeatureTransforms, data_log_density
from .warmup import batch_em, bic, initialise, kmeans_plus_plus, select_n_components

__all__ = [
    "COVARIANCE_TYPES",
    "FORMAT_VERSION",
    "FeatureTransforms",
    "IllConditionedError",
    "Mixture",
    "ModelError",
    "NotEnoughDataError",
    "Scores",
    "ShoalError",
    "StepSchedule",
    "TRANSFORMS",
    "batch_em",
    "bic",
    "data_log_density",
    "floor_from_half_life",
    "initialise",
    "kmeans_plus_plus",
    "select_n_components",
]
