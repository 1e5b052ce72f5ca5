"""No module of the package uses another module's ``_private`` name.

Checked statically with ``ast``, for what can be seen without running the code:
``from shoal.x import _name`` (or a relative ``from .x import _name``), and
``module._name`` where ``module`` is a name bound to a shoal module by an import in
the same file (``import shoal.core.x as module``, ``from shoal.core import module``).
A private module (``shoal.core._kernels``) may be imported by the modules of its own
package.
Attribute access on objects (``model._rows``, ``service._ready``) is checked by name:
a ``_name`` read on anything but ``self`` or ``cls`` must be one that the same module
defines (a function, class, attribute or argument of its own); the named tuple's
``_replace``, ``_asdict`` and ``_fields`` are public API.
"""

from __future__ import annotations

import ast

from test_import_graph import module_files


def _private(name: str) -> bool:
    return name.startswith("_") and not name.startswith("__")


def offences():
    files = module_files()
    known = set(files)
    found = []
    for name, path in files.items():
        if path is None:
            continue
        is_package = path.name == "__init__.py"
        here = name.split(".") if is_package else name.split(".")[:-1]
        tree = ast.parse(path.read_text(), str(path))
        modules = {}   # local name -> shoal module it is bound to
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                for alias in node.names:
                    if alias.name in known and alias.asname:
                        modules[alias.asname] = alias.name
            elif isinstance(node, ast.ImportFrom):
                stem = ".".join(here[: len(here) - node.level + 1]
                                + ([node.module] if node.module else [])) if node.level \
                    else (node.module or "")
                if not stem.startswith("shoal"):
                    continue
                for alias in node.names:
                    target = f"{stem}.{alias.name}"
                    if target in known:
                        # a private module is its own package's (fused and _kernels)
                        if _private(alias.name) and stem != ".".join(here):
                            found.append(f"{name}:{node.lineno} imports module {target}")
                        modules[alias.asname or alias.name] = target
                    elif _private(alias.name) and stem != name:
                        found.append(f"{name}:{node.lineno} imports {stem}.{alias.name}")
        for node in ast.walk(tree):
            if isinstance(node, ast.Attribute) and _private(node.attr) \
                    and isinstance(node.value, ast.Name) and node.value.id in modules \
                    and modules[node.value.id] != name:
                found.append(f"{name}:{node.lineno} uses {modules[node.value.id]}.{node.attr}")
    return sorted(found)


def test_no_module_uses_another_module_s_private_name():
    found = offences()
    assert not found, "\n".join(found)


NAMED_TUPLE_API = {"_replace", "_asdict", "_fields", "_make"}


def object_offences(sources):
    """``obj._name`` reads of a ``_name`` the module does not define itself."""
    found = []
    for name, text in sources:
        tree = ast.parse(text)
        own = set()
        for node in ast.walk(tree):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)):
                own.add(node.name)
            elif isinstance(node, ast.Attribute) and isinstance(node.ctx, ast.Store):
                own.add(node.attr)
            elif isinstance(node, ast.Name) and isinstance(node.ctx, ast.Store):
                own.add(node.id)
            elif isinstance(node, ast.arg):
                own.add(node.arg)
        for node in ast.walk(tree):
            if isinstance(node, ast.Attribute) and _private(node.attr) \
                    and node.attr not in own and node.attr not in NAMED_TUPLE_API \
                    and not (isinstance(node.value, ast.Name) and node.value.id in ("self", "cls")):
                found.append(f"{name}:{node.lineno} uses .{node.attr} of {ast.unparse(node.value)}")
    return sorted(found)


def test_no_module_reaches_into_another_module_s_objects():
    sources = [(name, path.read_text()) for name, path in module_files().items()
               if path is not None and path.suffix == ".py"]
    found = object_offences(sources)
    assert not found, "\n".join(found)


def test_the_object_check_sees_a_private_method_of_another_module():
    here = "class A:\n    def _own(self):\n        return 1\n\ndef f(a):\n    return a._own()\n"
    there = "def g(service):\n    return len(service._ready) + service.url._replace(x=1).x\n"
    assert object_offences([("here", here), ("there", there)]) == [
        "there:2 uses ._ready of service"]
