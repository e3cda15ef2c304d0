"""The package's import graph has no cycle (issue 10: one package per pipeline stage, no cycles).

Common practice, no source: every module of ``composition`` is parsed with ``ast``; each import of
another module of the package, at module level or inside a function (lazy imports count: they
hide a cycle, they do not remove it), is an edge; the graph must be acyclic, and every module must
import on its own.
"""

from __future__ import annotations

import ast
import importlib
from pathlib import Path

import composition

ROOT = Path(composition.__file__).parent


def _modules() -> dict[str, Path]:
    out = {}
    for path in ROOT.rglob("*.py"):
        parts = list(path.relative_to(ROOT.parent).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts.pop()
        out[".".join(parts)] = path
    return out


def _resolve(name: str, modules: dict[str, Path]) -> str | None:
    """The package module an imported name belongs to (``a.b.c`` -> ``a.b`` if ``c`` is not a module)."""
    while name and name not in modules:
        name = name.rpartition(".")[0]
    return name or None


def _edges(module: str, path: Path, modules: dict[str, Path]) -> set[str]:
    package = module if path.name == "__init__.py" else module.rpartition(".")[0]
    found = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        names = []
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")
                anchor = anchor[:len(anchor) - (node.level - 1)]
                base = ".".join(anchor + ([base] if base else []))
            names = [f"{base}.{a.name}" if f"{base}.{a.name}" in modules else base for a in node.names]
        for name in names:
            target = _resolve(name, modules)
            if target and target != module and target.startswith("composition"):
                found.add(target)
    return found


def _cycle(graph: dict[str, set[str]]) -> list[str] | None:
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(node):
        state[node] = 1
        stack.append(node)
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == 1:
                return stack[stack.index(nxt):] + [nxt]
            if nxt not in state:
                found = visit(nxt)
                if found:
                    return found
        state[node] = 2
        stack.pop()
        return None

    for node in sorted(graph):
        if node not in state:
            found = visit(node)
            if found:
                return found
    return None


def test_import_graph_is_acyclic():
    """Common practice, no source: no module of the package reaches itself through imports."""
    modules = _modules()
    graph = {m: _edges(m, p, modules) for m, p in modules.items()}
    assert graph["composition.run.cluster"], "the graph builder found no edges; it cannot be trusted"
    assert "composition.run.units" in graph["composition.run.cluster"]
    assert _cycle(graph) is None, " -> ".join(_cycle(graph))


def test_cycle_finder_finds_a_cycle(tmp_path):
    """Common practice, no source: the checker above can fail: a two-module cycle is reported, and a
    name taken from the package's ``__init__`` inside a function (the old package <-> scan cycle
    through ``__version__``) is an edge to the package."""
    assert _cycle({"a": {"b"}, "b": {"a"}}) == ["a", "b", "a"]
    assert _cycle({"a": {"b"}, "b": set()}) is None
    fake = tmp_path / "fake.py"
    fake.write_text("def f():\n    from .. import __version__\n    from .units import WorkUnit\n")
    assert _edges("composition.run.fake", fake, _modules()) == {"composition", "composition.run.units"}


def test_every_module_imports_on_its_own():
    """Common practice, no source: each module imports in a fresh namespace order without error."""
    for name in sorted(_modules()):
        if name.endswith("__main__"):
            continue
        importlib.import_module(name)
