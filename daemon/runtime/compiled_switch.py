"""The process-wide choice between core's compiled kernels and its numpy path, made once
at start-up from the environment: ``SHOAL_COMPILED`` set to ``0``, ``false``, ``no`` or
``off`` switches the compiled kernels off (core itself reads no environment; it keeps
the compiled path whenever the extension is built, until told otherwise through
:func:`shoal.core.fused.set_enabled`).
"""

from __future__ import annotations

import os
from collections.abc import Mapping

from shoal.core import fused

__all__ = ["apply_environment", "OFF_WORDS"]

OFF_WORDS = ("0", "false", "no", "off")


def apply_environment(environ: Mapping[str, str] | None = None) -> bool:
    """Switch the compiled kernels off when ``SHOAL_COMPILED`` says so; return whether
    they are in use afterwards. An unset or other value leaves core's own default (on
    when the extension is built)."""
    env = os.environ if environ is None else environ
    if env.get("SHOAL_COMPILED", "1").strip().lower() in OFF_WORDS:
        fused.set_enabled(False)
    return fused.enabled()
