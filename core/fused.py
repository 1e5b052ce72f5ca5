"""Compiled kernels for the element-wise passes of scoring and the sparse M-step.

The numpy path of :mod:`shoal.core.mixture` makes a dozen passes over every block of
rows after the log-joint GEMM (sum of squares, max, shift, argmax, clamp, exp, sum,
divide, log) and then, per component, a ``flatnonzero``, a gather, a weighting and a
GEMM for the statistics; each pass is a separate numpy call over the block. Here the
passes between the BLAS calls run as a few compiled loops over the block while it
sits in the cache. BLAS keeps the two products it is best at (the whitening GEMM of
the full type and the statistics' GEMMs) and numpy keeps ``exp`` (its SIMD ``exp``
beats a compiled scalar one).

The kernels are compiled by numba on first use and cached on disk beside this file
(or under ``NUMBA_CACHE_DIR``). Without numba, or with ``SHOAL_JIT=0`` in the
environment, :func:`enabled` is false and the mixture keeps its numpy path, which
gives the same results up to rounding (tests compare the two).

Floating-point contract: everything is float64, with no fast-math licence: every
sum runs in the order written (components in index order), so results do not depend
on how the compiler vectorises.
"""

from __future__ import annotations

import os

__all__ = ["enabled", "set_enabled", "kernels"]

_STATE: dict = {}


def enabled() -> bool:
    """Whether the compiled kernels are in use (numba importable, not switched off)."""
    on = _STATE.get("on")
    if on is None:
        on = os.environ.get("SHOAL_JIT", "1").strip().lower() not in ("0", "false", "no", "off")
        if on:
            try:
                kernels()
            except ImportError:
                on = False
        _STATE["on"] = on
    return on


def set_enabled(on: bool) -> None:
    """Switch the compiled kernels on or off in this process (tests compare both paths)."""
    if on:
        kernels()   # raises ImportError without numba
    _STATE["on"] = bool(on)


def kernels():
    """The compiled kernels (the module :mod:`shoal.core.kernels`, which imports
    numba); numba compiles each, or loads it from its cache, on first call."""
    k = _STATE.get("kernels")
    if k is None:
        from . import kernels as k
        _STATE["kernels"] = k
    return k


def warm() -> bool:
    """Compile (or load from numba's cache) every kernel for the array layouts the
    mixture uses, on a few synthetic rows, so that the first real input does not wait
    for the compiler: about 8 s on a fresh install, then well under a second per
    process (mostly importing numba). Returns whether the compiled kernels are in use."""
    if not enabled():
        return False
    import numpy as np

    from .mixture import Mixture
    from .schedule import StepSchedule

    X = np.random.default_rng(0).normal(size=(64, 2))
    means = np.array([[0.0, 0.0], [2.0, 2.0]])
    shapes = {"full": np.stack([np.eye(2)] * 2), "diag": np.ones((2, 2)),
              "spherical": np.ones(2)}
    for covariance, cov in shapes.items():
        model = Mixture.from_parameters([0.5, 0.5], means, cov, covariance=covariance,
                                        schedule=StepSchedule().resolved(100))
        model, _ = model.learn(X)
        model.score(X)
        model.em_step(X)
    return True
