"""The map in the docs is the map of the code: every module, package or file that
README.md and DEVELOPERS.md name exists, and both name every daemon sub-package."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
DOCS = {name: (ROOT / name).read_text("utf-8") for name in ("README.md", "DEVELOPERS.md")}
PATH = re.compile(r"`((?:core|daemon|config|scripts|tests)/[A-Za-z0-9_./-]*?)(?:::[^`]*)?`")
PATH_IN_TABLE = re.compile(r"(?<![\w/.])((?:core|daemon|config|scripts|tests)/[A-Za-z0-9_/-]+(?:\.[a-z]+)?)")


def named_paths(text: str) -> set[str]:
    """Repository paths a text names in backticks, with the ``dir/a.py, b.py`` shorthand
    of the docs' tables read as ``dir/b.py``."""
    found = set()
    for m in PATH.finditer(text):
        found.add(m.group(1).rstrip("/"))
    return found


def sub_packages() -> list[str]:
    return sorted(p.parent.name for p in (ROOT / "daemon").glob("*/__init__.py"))


def section(text: str, heading: str) -> str:
    """The text under a markdown heading, up to the next heading of that level or above."""
    m = re.search(rf"^(#+) {re.escape(heading)}\s*$", text, re.M)
    assert m, f"no heading {heading!r}"
    level = len(m.group(1))
    rest = text[m.end():]
    end = re.search(rf"^#{{1,{level}}} ", rest, re.M)
    return rest[:end.start()] if end else rest


def test_every_named_path_exists():
    missing = sorted(f"{doc}: {path}" for doc, text in DOCS.items()
                     for path in named_paths(text) if not (ROOT / path).exists())
    assert not missing, "\n".join(missing)


def test_the_check_finds_a_missing_path():
    assert named_paths("see `daemon/nowhere/gone.py` and `tests/x.py::test_y`") == {
        "daemon/nowhere/gone.py", "tests/x.py"}


def test_both_maps_name_every_daemon_sub_package():
    packages = sub_packages()
    assert len(packages) >= 10, packages
    flow = section(DOCS["README.md"], "How shoal is built")
    guide = section(DOCS["DEVELOPERS.md"], "The map")
    for where, text in (("README.md, How shoal is built", flow), ("DEVELOPERS.md, The map", guide)):
        absent = [p for p in packages if f"daemon/{p}/" not in text]
        assert not absent, f"{where} does not name {absent}"


def test_the_path_of_one_input_is_named_in_order_and_exists():
    # the modules one input passes, in the order the README's paragraph gives them
    flow = section(DOCS["README.md"], "How shoal is built")
    guide = section(DOCS["DEVELOPERS.md"], "The map")
    path = re.search(r"One input passes(.*?)(?:\n\n|$)", flow, re.S)
    assert path, "README's paragraph says which modules one input passes"
    modules = PATH.findall(path.group(1))
    assert len(modules) >= 6, modules
    for module in modules:
        assert (ROOT / module).is_file(), module
        assert module in guide, f"DEVELOPERS.md's map does not name {module}"
    # the guide gives them in the same order
    positions = [guide.index(module) for module in modules]
    assert positions == sorted(positions), list(zip(modules, positions))


BARE = re.compile(r"`([a-z_0-9]+\.(?:py|c|h))`")


def bare_names_missing(text: str) -> list[str]:
    """In a table row, a bare ``name.py`` is a module of the folder of the row's first
    path (``daemon/files/`` or ``core/drift.py``); those that do not exist."""
    missing = []
    for line in text.splitlines():
        if not line.startswith("| `"):
            continue
        first = PATH.search(line)
        if not first:
            continue
        folder = first.group(1) if first.group(1).endswith("/") else str(Path(first.group(1)).parent)
        missing += [f"{folder.rstrip('/')}/{name}" for name in BARE.findall(line)
                    if not (ROOT / folder / name).exists()]
    return missing


def test_every_module_a_table_row_names_exists():
    missing = bare_names_missing(DOCS["DEVELOPERS.md"]) + bare_names_missing(DOCS["README.md"])
    assert not missing, missing


def test_the_row_check_finds_a_missing_module():
    row = "| `daemon/files/` | bytes | `readers.py`, `no_such_module.py` |"
    assert bare_names_missing(row) == ["daemon/files/no_such_module.py"]
