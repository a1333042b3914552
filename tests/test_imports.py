"""Imports run one way: no module of leafcv imports, at any depth and even inside a function, a module that
imports it back (DEVELOPERS.md: "imports one way"). The graph is read from the source with `ast`; the
cycles are its strongly connected components (Tarjan 1972, "Depth-first search and linear graph
algorithms", SIAM J. Comput. 1:146-160)."""
from __future__ import annotations

import ast
from pathlib import Path

SRC = Path(__file__).resolve().parents[1] / "src" / "leafcv"


def _modules() -> dict[str, Path]:
    out = {}
    for f in SRC.rglob("*.py"):
        parts = f.relative_to(SRC.parent).with_suffix("").parts
        out[".".join(parts[:-1] if parts[-1] == "__init__" else parts)] = f
    return out


def import_graph() -> dict[str, set[str]]:
    mods = _modules()
    graph: dict[str, set[str]] = {m: set() for m in mods}
    for m, f in mods.items():
        package = m if f.name == "__init__.py" else m.rsplit(".", 1)[0]
        for node in ast.walk(ast.parse(f.read_text())):
            targets = []
            if isinstance(node, ast.ImportFrom):
                base = node.module or ""
                if node.level:
                    parts = package.split(".")
                    base = ".".join(parts[:len(parts) - node.level + 1] + ([node.module] if node.module else []))
                targets = [f"{base}.{a.name}" if f"{base}.{a.name}" in mods else base for a in node.names]
            elif isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            graph[m].update(t for t in targets if t in mods and t not in (m, "leafcv"))
    return graph


def cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(graph[v]):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                component.append(w)
                if w == v:
                    break
            if len(component) > 1:
                found.append(sorted(component))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return found


def test_the_detector_finds_a_cycle_and_a_self_free_chain():
    assert cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]
    assert cycles({"a": {"b"}, "b": {"c"}, "c": set()}) == []


def test_the_graph_sees_relative_and_function_level_imports():
    graph = import_graph()
    assert "leafcv.cv.psis" in graph["leafcv.cv.plan"]            # from .psis import ... (top level)
    assert "leafcv.cv.methods" in graph["leafcv.cv.plan"]         # from .methods import ... (in a function)
    assert "leafcv.fvcb" in graph["leafcv.compare"]               # from . import fvcb


def test_no_import_cycles():
    assert cycles(import_graph()) == []
