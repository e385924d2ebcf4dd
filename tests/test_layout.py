"""The package's shape: stages that import only the stages above them, no
import circles, no module over 600 lines, a short top level (DEVELOPERS.md,
"One path for the data").

Imports are read with ast from the sources, at any depth (a lazy import
inside a function counts like one at the top), so a circle cannot hide
behind a function-level import.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
MAX_LINES = 600
MAX_TOP_MODULES = 12

#: Stage of a codegen module: the first matching prefix.
STAGES = (
    ("codegen.cli", "cli"),
    ("codegen.api", "api"),
    ("codegen.verify", "verify"),
    ("codegen.sim", "sim"),
    ("codegen.model", "model"),
    ("codegen.backends", "backends"),
    ("codegen.reference", "reference"),
    ("codegen.booster", "reference"),   # the SCvx reference (issue 19)
    ("codegen.emit", "emit"),
    ("codegen.bind", "bind"),
    ("codegen.plot", "plot"),
    ("codegen.report", "report"),
    ("codegen.errors", "util"),
    ("codegen.fsutil", "util"),
    ("codegen.progress", "util"),
    ("codegen", "util"),           # the package itself: __version__
)

#: Which stages each stage may import besides itself. "util" is errors,
#: fsutil, progress and the package's __version__; the model takes only
#: errors and fsutil (checked below by module).
MAY_IMPORT = {
    "util": set(),
    "model": {"util"},
    "reference": {"util", "model"},
    "backends": {"util", "model"},
    "emit": {"util", "model", "backends"},
    "bind": {"util", "model", "emit"},
    "plot": {"util", "model"},
    "report": {"util", "model"},
    "verify": {"util", "model", "reference", "emit", "bind", "plot", "report"},
    "sim": {"util", "model", "reference", "emit", "bind", "plot", "report"},
    "cli": {"util", "model", "reference", "backends", "emit", "bind", "plot", "report",
            "verify", "sim", "api"},
    # The Python API (codegen/api.py) gathers the stages for scripts.
    "api": {"util", "model", "reference", "backends", "emit", "bind"},
}
MODEL_MAY_IMPORT = {"codegen.errors", "codegen.fsutil"}


def module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def sources() -> dict:
    """{module name: path} of every module of codegen/ and bench/."""
    out = {}
    for top in ("codegen", "bench"):
        for p in sorted((ROOT / top).rglob("*.py")):
            out[module_name(p)] = p
    return out


def imports_of(name: str, path: Path, known) -> set:
    """Internal modules that ``name`` imports, at any depth of its source."""
    tree = ast.parse(path.read_text(), str(path))
    is_pkg = path.name == "__init__.py"
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            targets = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                pkg = name.split(".") if is_pkg else name.split(".")[:-1]
                pkg = pkg[:len(pkg) - node.level + 1]
                base = ".".join(pkg + ([base] if base else []))
            targets = [f"{base}.{a.name}" if f"{base}.{a.name}" in known else base
                       for a in node.names]
        else:
            continue
        for t in targets:
            while t and t not in known:
                t = t.rpartition(".")[0]
            if t and t != name:
                found.add(t)
    return found


def graph() -> dict:
    src = sources()
    return {name: imports_of(name, path, src) for name, path in src.items()}


def circles(g: dict) -> list:
    """Strongly connected components of more than one module (Tarjan, iterative)."""
    index, low, on, stack, out = {}, {}, set(), [], []
    counter = 0
    for root in sorted(g):
        if root in index:
            continue
        work = [(root, iter(sorted(g.get(root, ()))))]
        index[root] = low[root] = counter
        counter += 1
        stack.append(root)
        on.add(root)
        while work:
            v, it = work[-1]
            w = next(it, None)
            if w is None:
                work.pop()
                if work:
                    low[work[-1][0]] = min(low[work[-1][0]], low[v])
                if low[v] == index[v]:
                    comp = []
                    while True:
                        x = stack.pop()
                        on.discard(x)
                        comp.append(x)
                        if x == v:
                            break
                    if len(comp) > 1:
                        out.append(sorted(comp))
            elif w not in index:
                index[w] = low[w] = counter
                counter += 1
                stack.append(w)
                on.add(w)
                work.append((w, iter(sorted(g.get(w, ())))))
            elif w in on:
                low[v] = min(low[v], index[w])
    return out


def stage(name: str):
    for prefix, st in STAGES:
        if name == prefix or name.startswith(prefix + "."):
            return st
    return None


def layer_violations(g: dict) -> list:
    bad = []
    for a, targets in sorted(g.items()):
        sa = stage(a)
        for b in sorted(targets):
            sb = stage(b)
            if sb == "cli" and sa != "cli":
                bad.append(f"{a} imports the command line ({b})")
            elif a.startswith("bench") or sb is None or sa == sb:
                continue
            elif sa == "model" and b not in MODEL_MAY_IMPORT:
                bad.append(f"{a} (model) imports {b}: the model takes only errors and fsutil")
            elif sb not in MAY_IMPORT[sa]:
                bad.append(f"{a} ({sa}) imports {b} ({sb})")
    return bad


# -- the checks on the package ----------------------------------------------------------

def test_no_import_circles():
    assert circles(graph()) == []


def test_stages_import_only_the_stages_above_them():
    assert layer_violations(graph()) == []


def test_every_codegen_module_has_a_stage():
    assert [m for m in graph() if m.startswith("codegen") and stage(m) is None] == []


def test_no_module_over_600_lines():
    long = {str(p.relative_to(ROOT)): n for p in sources().values()
            if (n := p.read_bytes().count(b"\n")) > MAX_LINES}
    assert long == {}


def test_top_level_of_codegen_is_short():
    top = sorted(p.name for p in (ROOT / "codegen").glob("*.py"))
    assert len(top) <= MAX_TOP_MODULES, top


# -- the checker itself can fail ---------------------------------------------------------

def test_checker_finds_a_circle_through_a_lazy_import(tmp_path):
    a = tmp_path / "a.py"
    a.write_text("import b\n")
    b = tmp_path / "b.py"
    b.write_text("def f():\n    from a import g\n")
    known = {"a", "b"}
    g = {"a": imports_of("a", a, known), "b": imports_of("b", b, known)}
    assert circles(g) == [["a", "b"]]
    assert circles({"a": {"b"}, "b": {"c"}, "c": set()}) == []


@pytest.mark.parametrize("edge,words", [
    (("codegen.verify.check", "codegen.cli.common"), "imports the command line"),
    (("codegen.model.problem", "codegen.backends.base"), "the model takes only"),
    (("codegen.model.problem", "codegen.progress"), "the model takes only"),
    (("codegen.emit", "codegen.bind"), "(emit) imports codegen.bind (bind)"),
    (("codegen.sim.loop", "codegen.verify.check"), "(sim) imports codegen.verify.check"),
    (("bench.session", "codegen.cli"), "imports the command line"),
])
def test_checker_finds_layer_violations(edge, words):
    a, b = edge
    bad = layer_violations({a: {b}})
    assert len(bad) == 1 and words in bad[0]
    assert layer_violations({"codegen.verify.check": {"codegen.bind", "codegen.model.problem"}}) == []
