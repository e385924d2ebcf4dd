"""codegen/ uses no private attribute or function of a dependency.

Any release of a dependency may change or remove what it keeps private (a
leading underscore); the lock (requirements.lock) pins today's versions, but
an upgrade must not break on it. The rule checked here is stricter and
simpler: outside ``self``/``cls``, codegen/ reads no attribute whose name
starts with one underscore (``obj._x``, ``getattr(obj, "_x")``) and imports
no such name from another package. Dunders (``__version__``) are public.
"""

import ast

from conftest import ROOT


def _private(name: str) -> bool:
    return name.startswith("_") and not (name.startswith("__") and name.endswith("__"))


def private_uses(source: str, filename: str) -> list:
    found = []
    for node in ast.walk(ast.parse(source, filename)):
        if isinstance(node, ast.Attribute) and _private(node.attr):
            if not (isinstance(node.value, ast.Name) and node.value.id in ("self", "cls")):
                found.append(f"{filename}:{node.lineno}: .{node.attr}")
        elif (isinstance(node, ast.Call) and isinstance(node.func, ast.Name)
              and node.func.id in ("getattr", "hasattr", "setattr", "delattr")
              and len(node.args) >= 2 and isinstance(node.args[1], ast.Constant)
              and isinstance(node.args[1].value, str) and _private(node.args[1].value)):
            found.append(f"{filename}:{node.lineno}: {node.func.id}(..., {node.args[1].value!r})")
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            top = node.module.split(".")[0]
            if top != "codegen":
                parts = node.module.split(".") + [a.name for a in node.names]
                if any(_private(p) for p in parts):
                    found.append(f"{filename}:{node.lineno}: from {node.module} import "
                                 + ", ".join(a.name for a in node.names))
        elif isinstance(node, ast.Import):
            for a in node.names:
                if a.name.split(".")[0] != "codegen" and any(_private(p) for p in a.name.split(".")):
                    found.append(f"{filename}:{node.lineno}: import {a.name}")
    return sorted(found, key=lambda f: int(f.split(":")[1]))


def test_codegen_uses_no_private_names_of_other_objects():
    found = []
    files = sorted((ROOT / "codegen").rglob("*.py"))
    assert len(files) > 20
    for path in files:
        found += private_uses(path.read_text(), str(path.relative_to(ROOT)))
    assert found == []


def test_the_scan_finds_what_it_looks_for():
    src = ("import numpy._core\nfrom cvxpy.problems import _x\n"
           "def f(p, self):\n    p.problem._solver_cache.clear()\n"
           "    getattr(p, '_solver_cache', None)\n    self._ok, p.__class__\n")
    found = private_uses(src, "x.py")
    assert found == ["x.py:1: import numpy._core", "x.py:2: from cvxpy.problems import _x",
                     "x.py:4: ._solver_cache", "x.py:5: getattr(..., '_solver_cache')"], found
