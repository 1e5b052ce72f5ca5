"""No module of the package uses another module's ``_private`` name.

Checked statically with ``ast``, for what can be seen without running the code:
``from shoal.x import _name`` (or a relative ``from .x import _name``), and
``module._name`` where ``module`` is a name bound to a shoal module by an import in
the same file (``import shoal.core.x as module``, ``from shoal.core import module``).
A private module (``shoal.core._kernels``) may be imported by the modules of its own
package.
Attribute access on objects of another module's classes (``model._rows``) is not
seen here.
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
