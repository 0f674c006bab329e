"""The import graph of ``app/`` keeps the design's one-way layers (shared/DESIGN.md,
"Layout": a module knows only the layers below it). Read from the source with
:mod:`ast`, every import counted, also those inside functions (common practice,
no source)."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

APP = Path(__file__).resolve().parents[1] / "app"


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(APP.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _graph() -> dict[str, set[str]]:
    """Module -> the ``app`` modules it imports (a package import names its ``__init__``)."""
    files = {_module_name(p): p for p in APP.rglob("*.py")}
    graph: dict[str, set[str]] = {}
    for name, path in files.items():
        is_pkg = path.name == "__init__.py"
        deps: set[str] = set()
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            targets: list[str] = []
            if isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                base = node.module or ""
                if node.level:
                    pkg = name.split(".") if is_pkg else name.split(".")[:-1]
                    pkg = pkg[:len(pkg) - node.level + 1]
                    base = ".".join(pkg + ([base] if base else []))
                subs = [f"{base}.{a.name}" for a in node.names]
                # ``from pkg import submodule`` takes the submodule, not the package's face
                targets = subs + ([base] if any(t not in files for t in subs) else [])
            for t in targets:
                while t and t not in files:
                    t = t.rpartition(".")[0]
                if t and t != name:
                    deps.add(t)
        graph[name] = deps
    return graph


def _in(module: str, layer: str) -> bool:
    return module == layer or module.startswith(layer + ".")


@pytest.mark.parametrize(("lower", "upper"), [
    ("app.io", "app.traces"),
    ("app.io", "app.store"),
    ("app.io", "app.web"),
    ("app.io", "app.worker"),
    ("app.store", "app.worker"),
    ("app.store", "app.web"),
    ("app.store", "app.cli"),
    ("app.worker", "app.web"),
    ("app.worker", "app.cli"),
    ("app.traces", "app.store"),
    ("app.traces", "app.web"),
    ("app.traces", "app.worker"),
    ("app.traces", "app.cli"),
    ("app.traces", "app.analysis"),
])
def test_no_upward_import(lower, upper):
    """``lower`` never imports ``upper``."""
    bad = sorted(f"{m} -> {d}" for m, deps in _graph().items() if _in(m, lower)
                 for d in deps if _in(d, upper))
    assert not bad, bad


def test_no_analyser_imports_another():
    """Analysers share work only through the plan's steps (app/traces/plan.py): no
    analyser module imports another analyser module."""
    from app.traces import plan

    analysers = {m.__name__ for m in plan.ANALYSERS}
    assert len(analysers) >= 10
    graph = _graph()
    bad = sorted(f"{m} -> {d}" for m in analysers for d in graph[m] if d in analysers)
    assert not bad, bad


def test_no_circle():
    """No import circle anywhere in ``app`` (Tarjan's strongly connected components;
    a component of more than one module is a circle)."""
    graph = _graph()
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on: set[str] = set()
    circles: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on.add(v)
        for w in graph.get(v, ()):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                circles.append(sorted(comp))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    assert not circles, circles
