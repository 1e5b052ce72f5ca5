"""A self-check of the compiled kernels at start-up, over the mixture itself.

It lives apart from :mod:`shoal.core.fused` because it drives a
:class:`~shoal.core.mixture.Mixture`, which imports ``fused``: kept here, the two
modules do not import each other.
"""

from __future__ import annotations

import numpy as np

from . import fused
from .baseline import Baseline
from .distances import GaussianSet
from .mixture import Mixture
from .piece_tallies import piece_tallies
from .schedule import StepSchedule
from .window_statistics import WindowSums, window_statistics

__all__ = ["warm"]


def warm() -> bool:
    """Run every compiled kernel once on a few synthetic rows.

    A self-check at start-up: a broken build fails here, not inside the first input.
    Each covariance type learns, scores and takes one EM step on 64 seeded rows of two
    features, and the segment watch's passes tally the rows and compare their window
    with a baseline, a cost too small to notice beside the service's start.

    Returns
    -------
    compiled : bool
        True when the compiled kernels are in use (and ran); False when the numpy path
        is, in which case nothing is run.
    """
    if not fused.enabled():
        return False
    X = np.random.default_rng(0).normal(size=(64, 2))
    means = np.array([[0.0, 0.0], [2.0, 2.0]])
    shapes = {"full": np.stack([np.eye(2)] * 2), "diag": np.ones((2, 2)),
              "spherical": np.ones(2)}
    for covariance, cov in shapes.items():
        model = Mixture.from_parameters([0.5, 0.5], means, cov, covariance=covariance,
                                        schedule=StepSchedule().resolved(100))
        model, scores = model.learn(X, moments=True)
        model.score(X)
        model.em_step(X)
        # the segment watch's passes: a piece's tallies and a window's statistics
        piece_tallies(scores.log_density, scores.component, X, model.center, 2,
                      unusual_below=float(np.median(scores.log_density)), near_below=0.0,
                      first=1, stride=4, sample=True)
        ref = Baseline.from_mixture(model)
        m = scores.moments
        if m is not None:
            window_statistics(ref, GaussianSet(ref.means, ref.covariances), [len(X)],
                              WindowSums(T=m.T, Q=m.Q, M=m.M, S=m.S, B=m.B),
                              model.center[None], min_share=0.25)
    return True
