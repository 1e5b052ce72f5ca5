"""The import graph of the package: no cycle, and the layers' rule (daemon may import
config and core, config may import core, core imports nothing of shoal outside core).

Built statically with ``ast`` from the package's source folders; an import counts
wherever it stands, at the top of a module or inside a function (a function-level
import still ties the two modules together, only later).
"""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
PARTS = ("core", "config", "daemon")
# which parts each part may import besides itself
ALLOWED = {"core": set(), "config": {"core"}, "daemon": {"core", "config"}}


def module_files():
    out = {}
    for part in PARTS:
        for path in sorted((ROOT / part).rglob("*.py")):
            rel = path.relative_to(ROOT).with_suffix("")
            names = ["shoal", *rel.parts]
            if names[-1] == "__init__":
                names.pop()
            out[".".join(names)] = path
        # compiled extensions (core/_kernels.c) are modules that import nothing of shoal
        for path in sorted((ROOT / part).rglob("*.c")):
            out[".".join(["shoal", *path.relative_to(ROOT).with_suffix("").parts])] = None
    return out


def imported_modules(name: str, path: Path, known: set[str]) -> set[str]:
    """The package's modules that ``name`` imports (an imported package counts as its
    ``__init__``; ``from pkg import mod`` counts the module ``pkg.mod``)."""
    is_package = path.name == "__init__.py"
    here = name.split(".") if is_package else name.split(".")[:-1]
    found = set()
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.Import):
            targets = [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = here[: len(here) - node.level + 1]
                stem = ".".join(base + ([node.module] if node.module else []))
            else:
                stem = node.module or ""
            # `from pkg import mod` ties to the module; `from pkg import name` to pkg
            targets = [f"{stem}.{alias.name}" if f"{stem}.{alias.name}" in known else stem
                       for alias in node.names]
        else:
            continue
        for target in targets:
            if target in known:
                found.add(target)
            elif target.startswith("shoal."):
                # `import shoal.core.x.y` or an attribute of a module: its nearest module
                parts = target.split(".")
                while parts and ".".join(parts) not in known:
                    parts.pop()
                if parts:
                    found.add(".".join(parts))
    found.discard(name)
    return found


def import_graph():
    files = module_files()
    known = set(files)
    return {name: imported_modules(name, path, known) if path else set()
            for name, path in files.items()}


def part_of(module: str) -> str:
    return module.split(".")[1]


def find_cycle(graph):
    """One cycle of the graph as a list of modules, or None (depth-first search)."""
    state, stack = {}, []

    def visit(node):
        state[node] = "open"
        stack.append(node)
        for nxt in sorted(graph[node]):
            if state.get(nxt) == "open":
                return stack[stack.index(nxt):] + [nxt]
            if nxt not in state:
                cycle = visit(nxt)
                if cycle:
                    return cycle
        stack.pop()
        state[node] = "done"
        return None

    for node in sorted(graph):
        if node not in state:
            cycle = visit(node)
            if cycle:
                return cycle
    return None


def test_the_graph_sees_the_package():
    graph = import_graph()
    assert {"shoal.core.mixture", "shoal.core.fused", "shoal.daemon.cli.main",
            "shoal.config.settings"} <= set(graph)
    # relative and absolute imports are both resolved
    assert "shoal.core.fused" in graph["shoal.core.mixture"]
    assert "shoal.core" in graph["shoal.daemon.cli.main"]


def test_find_cycle_finds_one():
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert find_cycle({"a": {"b"}, "b": set()}) is None


def test_no_import_cycle():
    cycle = find_cycle(import_graph())
    assert cycle is None, "import cycle: " + " -> ".join(cycle)


def test_layers_import_downward_only():
    broken = sorted(
        f"{src} imports {dst}"
        for src, targets in import_graph().items()
        for dst in targets
        if part_of(dst) != part_of(src) and part_of(dst) not in ALLOWED[part_of(src)]
    )
    assert not broken, "\n".join(broken)


def test_scripts_and_tests_import_without_sys_path_edits():
    # the scripts are a package (run as `python -m scripts.NAME`); pytest puts the root
    # on the path (pyproject's pythonpath)
    edits = [f"{path.relative_to(ROOT)}:{n}"
             for folder in ("scripts", "tests") for path in sorted((ROOT / folder).rglob("*.py"))
             for n, line in enumerate(path.read_text().splitlines(), 1)
             if "sys.path" in line and path.name != Path(__file__).name]
    assert not edits, edits


def test_core_reads_no_environment():
    # the daemon reads the environment at start-up and tells core (fused.set_enabled)
    reads = []
    for name, path in module_files().items():
        if path is None or part_of(name) != "core":
            continue
        for node in ast.walk(ast.parse(path.read_text(), str(path))):
            if isinstance(node, ast.Attribute) and node.attr in ("environ", "getenv", "environb"):
                reads.append(f"{name}:{node.lineno}")
    assert not reads, reads
