"""Every package folder is installed: pyproject's explicit ``packages`` list names each
folder of core, daemon and config that has an ``__init__.py`` (a folder left out
installs nowhere but an editable checkout, and ``pip install .`` would lose it)."""

from __future__ import annotations

import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def package_folders() -> set[str]:
    found = set()
    for part in ("core", "daemon", "config"):
        for init in (ROOT / part).rglob("__init__.py"):
            rel = init.parent.relative_to(ROOT)
            found.add("shoal." + ".".join(rel.parts))
    return found


def test_pyproject_lists_every_package():
    listed = set(tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
                 ["packages"])
    folders = package_folders()
    assert "shoal.daemon.ingest" in folders
    assert folders - listed == set(), f"not in pyproject's packages: {sorted(folders - listed)}"
    assert listed - folders == set(), f"listed without a folder: {sorted(listed - folders)}"
