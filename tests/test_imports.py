"""The package layout: every module imports, no import circle among emulant's modules, no module
past ~400 lines, and the report never imports an estimator.

The graph is read from the source (``ast``), counting every import statement wherever it stands,
inside functions too, so an import moved into a function cannot hide a circle. ``from P import
name`` counts as an edge to ``P.name`` when that is a module, else to ``P``. Common practice for
layered code; no published source.
"""

from __future__ import annotations

import ast
import importlib
import pkgutil
from pathlib import Path

import pytest

import emulant

PACKAGE_DIR = Path(emulant.__file__).parent
MAX_LINES = 400


def _modules() -> dict[str, Path]:
    out = {}
    for info in pkgutil.walk_packages([str(PACKAGE_DIR)], prefix="emulant."):
        spec = importlib.util.find_spec(info.name)
        out[info.name] = Path(spec.origin)
    out["emulant"] = PACKAGE_DIR / "__init__.py"
    return out


MODULES = _modules()


def _resolve(module: str, is_package: bool, level: int, target: str | None) -> str:
    if level == 0:
        return target or ""
    base = module.split(".") if is_package else module.split(".")[:-1]
    base = base[: len(base) - (level - 1)]
    return ".".join(base + ([target] if target else []))


def import_graph() -> dict[str, set[str]]:
    """Module -> the emulant modules it imports (anywhere in its source)."""
    graph: dict[str, set[str]] = {}
    for name, path in MODULES.items():
        is_pkg = path.name == "__init__.py"
        edges: set[str] = set()
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                base = _resolve(name, is_pkg, node.level, node.module)
                targets = [f"{base}.{a.name}" if f"{base}.{a.name}" in MODULES else base
                           for a in node.names]
            else:
                continue
            edges |= {t for t in targets if t in MODULES and t != name}
        graph[name] = edges
    return graph


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One import circle as a list of modules (first == last), or None."""
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(u: str) -> list[str] | None:
        state[u] = 1
        stack.append(u)
        for v in sorted(graph.get(u, ())):
            if state.get(v) == 1:
                return stack[stack.index(v):] + [v]
            if v not in state and (found := visit(v)):
                return found
        stack.pop()
        state[u] = 2
        return None

    for u in sorted(graph):
        if u not in state and (found := visit(u)):
            return found
    return None


@pytest.mark.parametrize("name", sorted(set(MODULES) - {"emulant.__main__"}))  # that one runs
def test_every_module_imports(name):
    importlib.import_module(name)


def test_no_import_circle():
    cycle = find_cycle(import_graph())
    assert cycle is None, "import circle: " + " -> ".join(cycle)


def test_the_circle_check_finds_a_circle():
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert find_cycle({"a": {"b"}, "b": set()}) is None


def test_the_graph_sees_imports_inside_functions():
    graph = import_graph()
    # stages imports each stage's modules inside its functions (start-up time of a rule's job)
    assert "emulant.estimation.effects" in graph["emulant.stages"]


def test_report_reads_results_not_estimators():
    graph = import_graph()
    for name, edges in graph.items():
        if name.startswith("emulant.report"):
            bad = {e for e in edges if e.startswith(("emulant.estimation", "emulant.models"))}
            assert not bad, f"{name} imports {sorted(bad)}"


@pytest.mark.parametrize("name", sorted(MODULES))
def test_module_size(name):
    lines = MODULES[name].read_text(encoding="utf-8").count("\n")
    assert lines <= MAX_LINES, f"{name}: {lines} lines; split it by concern (DEVELOPERS.md)"
