"""Docstrings as the contributor guide promises them: numpydoc (a ``Parameters`` section
naming every argument, a ``Returns`` or ``Yields`` section where a value comes back) for
every public function and class of ``core``; a docstring for every module and public
class of ``daemon`` and ``config``. Read from the source (ast), so nothing is imported."""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def modules(part: str) -> list[Path]:
    return sorted(p for p in (ROOT / part).rglob("*.py"))


def public_defs(tree: ast.Module):
    """Top-level public functions and classes, and the public methods of public classes."""
    for node in tree.body:
        if isinstance(node, (ast.FunctionDef, ast.ClassDef)) and not node.name.startswith("_"):
            yield node, None
            if isinstance(node, ast.ClassDef):
                for item in node.body:
                    if isinstance(item, ast.FunctionDef) and not item.name.startswith("_"):
                        yield item, node


def returns_value(fn: ast.FunctionDef) -> bool:
    """Whether the function itself (not a nested one) returns or yields a value."""
    todo = list(fn.body)
    while todo:
        node = todo.pop()
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.Lambda, ast.ClassDef)):
            continue
        if isinstance(node, ast.Return) and node.value is not None and not (
                isinstance(node.value, ast.Constant) and node.value.value is None):
            return True
        if isinstance(node, (ast.Yield, ast.YieldFrom)):
            return True
        todo.extend(ast.iter_child_nodes(node))
    return False


def arguments(fn: ast.FunctionDef) -> list[str]:
    a = fn.args
    names = [x.arg for x in a.posonlyargs + a.args + a.kwonlyargs]
    names += [x.arg for x in (a.vararg, a.kwarg) if x is not None]
    # a leading underscore marks an argument private to the package, not documented
    return [n for n in names if n not in ("self", "cls") and not n.startswith("_")]


def numpydoc_problems(fn: ast.FunctionDef, owner: ast.ClassDef | None) -> list[str]:
    doc = ast.get_docstring(fn) or ""
    where = f"{owner.name}.{fn.name}" if owner else fn.name
    if not doc:
        return [f"{where}: no docstring"]
    decorators = {"property" if "property" in getattr(d, "id", getattr(d, "attr", "")) else ""
                  for d in fn.decorator_list}
    problems = []
    args = arguments(fn)
    if args and "property" not in decorators:
        if "Parameters\n----------" not in doc:
            problems.append(f"{where}: no Parameters section")
        else:
            section = doc.split("Parameters\n----------", 1)[1]
            absent = [a for a in args if not any(
                line.split(":")[0].strip().lstrip("*") in (a,) or
                a in [x.strip().lstrip("*") for x in line.split(":")[0].split(",")]
                for line in section.splitlines() if line and not line.startswith(" "))]
            if absent:
                problems.append(f"{where}: Parameters does not name {absent}")
    if returns_value(fn) and "property" not in decorators and not (
            "Returns\n-------" in doc or "Yields\n------" in doc):
        problems.append(f"{where}: no Returns section")
    return problems


def test_core_public_functions_and_classes_have_numpydoc():
    problems = []
    for path in modules("core"):
        tree = ast.parse(path.read_text("utf-8"))
        for node, owner in public_defs(tree):
            name = f"{path.relative_to(ROOT)}"
            if isinstance(node, ast.ClassDef):
                if not ast.get_docstring(node):
                    problems.append(f"{name}: class {node.name}: no docstring")
            else:
                problems += [f"{name}: {p}" for p in numpydoc_problems(node, owner)]
    assert not problems, f"{len(problems)} problems:\n" + "\n".join(problems)


def test_daemon_and_config_modules_and_public_classes_have_docstrings():
    problems = []
    for part in ("daemon", "config"):
        for path in modules(part):
            tree = ast.parse(path.read_text("utf-8"))
            name = f"{path.relative_to(ROOT)}"
            if not ast.get_docstring(tree):
                problems.append(f"{name}: no module docstring")
            problems += [f"{name}: class {node.name}: no docstring" for node in tree.body
                         if isinstance(node, ast.ClassDef) and not node.name.startswith("_")
                         and not ast.get_docstring(node)]
    assert not problems, f"{len(problems)} problems:\n" + "\n".join(problems)


def test_the_check_sees_a_missing_section():
    tree = ast.parse('def f(x, y):\n    """Sum.\n\n    Parameters\n    ----------\n'
                     '    x : float\n    """\n    return x + y\n')
    fn = tree.body[0]
    assert numpydoc_problems(fn, None) == ["f: Parameters does not name ['y']",
                                           "f: no Returns section"]
