"""The numeric core must stay pure: importing it pulls in no I/O or service code."""

import subprocess
import sys

FORBIDDEN = ["pyarrow", "watchdog", "yaml", "sqlite3", "shoal.daemon", "shoal.config"]


def test_core_imports_nothing_of_the_world():
    code = (
        "import importlib, pkgutil, sys\n"
        "import shoal.core\n"
        "for info in pkgutil.iter_modules(shoal.core.__path__):\n"
        "    importlib.import_module('shoal.core.' + info.name)\n"
        f"bad = [m for m in {FORBIDDEN!r} if m in sys.modules]\n"
        "print(','.join(bad))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "", f"shoal.core imported {out.stdout.strip()}"


def test_core_source_has_no_forbidden_imports():
    import pathlib
    import re

    import shoal.core

    root = pathlib.Path(shoal.core.__file__).parent
    pattern = re.compile(r"^\s*(from|import)\s+(pyarrow|watchdog|yaml|sqlite3|logging|shoal\.daemon|shoal\.config)\b", re.M)
    offenders = [p.name for p in root.glob("*.py") if pattern.search(p.read_text())]
    assert offenders == []

