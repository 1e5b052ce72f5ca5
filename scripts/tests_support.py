"""Load a helper module of the test suite (tests/support/NAME.py) by its file, for the scripts
that run the suite's seeded scenarios at full size. By file, not by package name: the
folder is not a package, and other installed distributions ship a top-level ``tests``."""
from __future__ import annotations

import importlib.util
import sys
from pathlib import Path
from types import ModuleType

TESTS = Path(__file__).resolve().parent.parent / "tests" / "support"


def load(name: str) -> ModuleType:
    """``tests/support/<name>.py`` as the module ``name`` (loaded once per process)."""
    if name in sys.modules:
        return sys.modules[name]
    spec = importlib.util.spec_from_file_location(name, TESTS / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module
