"""The modules depend on one another in one direction only: no import cycles, lazy imports included.

The coordinator (``run``) uses the checks (``check``); the checks are handed
what reaches the workers (a Dask client, a recount callable) by their caller.
"""

from __future__ import annotations

import ast
from pathlib import Path

import foldfarm

PACKAGE = Path(foldfarm.__file__).parent


def unit(module: str) -> str:
    """The unit a module belongs to: ``foldfarm.X`` (a subpackage counts as one)."""
    return ".".join(module.split(".")[:2])


def is_unit(name: str) -> bool:
    """Whether ``foldfarm.X`` names one of our modules or subpackages."""
    top = PACKAGE / name.split(".")[1]
    return top.with_suffix(".py").exists() or top.is_dir()


def imports() -> dict[str, set[str]]:
    """Unit -> the other foldfarm units its code imports, at the top or inside functions."""
    graph: dict[str, set[str]] = {}
    for path in PACKAGE.rglob("*.py"):
        name = ".".join(("foldfarm",) + path.relative_to(PACKAGE).with_suffix("").parts).removesuffix(".__init__")
        found = set()
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.Import):
                found |= {a.name for a in node.names}
            elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                found |= {node.module} | {f"{node.module}.{a.name}" for a in node.names}
        here = unit(name)
        units = {unit(m) for m in found if m.startswith("foldfarm.") and is_unit(m)}
        graph.setdefault(here, set()).update(units - {here})
    return graph


def cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One import cycle in ``graph``, or None (depth-first search, colouring nodes)."""
    state: dict[str, int] = {}
    path: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        path.append(node)
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == 1:
                return path[path.index(nxt):] + [nxt]
            if nxt not in state and (found := visit(nxt)):
                return found
        path.pop()
        state[node] = 2
        return None

    for start in sorted(graph):
        if start not in state and (found := visit(start)):
            return found
    return None


def test_the_cycle_finder_finds_a_cycle():
    assert cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert cycle({"a": {"b"}, "b": {"c"}, "c": set()}) is None


def test_no_module_imports_back_what_imports_it():
    graph = imports()
    # The walk sees the lazy imports inside functions, where the cycle used to hide.
    assert "foldfarm.run" in graph["foldfarm.cli"] and "foldfarm.check" in graph["foldfarm.run"]
    assert cycle(graph) is None, " -> ".join(cycle(graph))
    assert "foldfarm.run" not in graph["foldfarm.check"]
