"""The compiled passes of scoring and learning, and the switch between them and numpy.

The numpy path of :mod:`shoal.core.mixture` makes a dozen passes over every block of
rows after the log-joint GEMM (sum of squares, max, shift, argmax, clamp, exp, sum,
divide, log) and then, per component, a ``flatnonzero``, a gather, a weighting and a
GEMM for the statistics; each pass is a separate numpy call over the block, and a
refresh of the parameters is a few dozen small numpy and LAPACK calls. The C
extension ``shoal.core._kernels`` (core/_kernels.c) runs the passes between the BLAS
calls as a few loops over the block while it sits in the cache, gathers the rows each
component learns from for one SYRK per component, and derives a refresh's parameters
in one call. The log-joint and the softmax run in row-tiled kernels for AVX-512 or
AVX2 with FMA (picked by the CPU; elsewhere a BLAS GEMM and numpy's ``exp``); BLAS
keeps the M-step SYRKs.

The extension is built when shoal is installed (it needs a C compiler; the build is
optional). Without it, or once switched off with :func:`set_enabled` (the daemon does
so at start-up when ``SHOAL_COMPILED=0`` is in its environment; core reads none),
:func:`enabled` is false and the mixture keeps its numpy path, which gives the same
results up to the order of floating-point operations (tests compare the two).
"""

from __future__ import annotations

__all__ = ["enabled", "set_enabled", "kernels", "tiled", "packed_full_len"]

_STATE: dict = {}


def enabled() -> bool:
    """Whether the compiled kernels are in use (the extension built, not switched off)."""
    on = _STATE.get("on")
    if on is None:
        try:
            kernels()
            on = True
        except ImportError:
            on = False
        _STATE["on"] = on
    return on


def set_enabled(on: bool) -> None:
    """Switch the compiled kernels on or off in this process (tests compare both paths)."""
    if on:
        kernels()   # raises ImportError without the extension
    _STATE["on"] = bool(on)


def kernels():
    """The compiled kernels: the extension module ``shoal.core._kernels``."""
    k = _STATE.get("kernels")
    if k is None:
        from . import _kernels as k
        _STATE["kernels"] = k
    return k


def tiled() -> bool:
    """Whether the log-joint runs in the extension's row-tiled kernels (AVX-512 or AVX2
    with FMA, picked by the CPU) instead of a BLAS GEMM; see ``_kernels.tile_isa``."""
    return kernels().tile_isa() != "none"


def packed_full_len(n_components: int, n_features: int) -> int:
    """Length of the full type's operator packed for the tiled kernel (``pack_full``;
    the layout is the extension's own: per component and per block of 4 whitened
    coordinates, four offsets and four weights for each feature below the block's end)."""
    return n_components * kernels().packed_len(n_features)

