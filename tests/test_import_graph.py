"""The package's import graph: one direction of flow, no cycles, nothing in the library imports the command line.

Read with :mod:`ast` (every ``import`` and ``from ... import``, at module level or inside
functions), so the test sees the imports that run late as well as those that run first.
Layers, lowest first (a module may import its own layer and those below):

    foundation (errors, units, format, notes)  <  io  <  model  <  catalog  <  unmixing, design
    <  study  <  report  <  demo  <  cli

The top-level ``probeplan/__init__.py`` re-exports the public API lazily and sits above all of
them; the library's modules may read only its constants from it (the caution and the version).
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1] / "probeplan"

#: Layer of each top-level module or sub-package of probeplan (lower imports nothing higher).
LAYERS = {
    "errors": 0, "units": 0, "format": 0, "notes": 0, "data": 0,
    "io": 1,
    "model": 2,
    "catalog": 3,
    "unmixing": 4, "design": 4,
    "study": 5,
    "report": 6,
    "demo": 7,
    "cli": 8, "__main__": 8,
}
#: Names the library may import from the top-level package itself (plain constants defined there).
TOP_LEVEL_CONSTANTS = {"RESEARCH_USE_CAUTION", "__version__"}


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _imports(path: Path) -> list[tuple[str, list[str], int]]:
    """(imported module, names taken from it, line) for every import in the file, relative ones resolved."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    here = _module_name(path).split(".")
    package = here if path.name == "__init__.py" else here[:-1]
    out = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out += [(a.name, [], node.lineno) for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package[: len(package) - node.level + 1]
                module = ".".join(base + ([node.module] if node.module else []))
            else:
                module = node.module or ""
            out.append((module, [a.name for a in node.names], node.lineno))
    return [(m, names, line) for m, names, line in out if m == "probeplan" or m.startswith("probeplan.")]


def _graph() -> dict[str, list[tuple[str, list[str], int]]]:
    return {_module_name(p): _imports(p) for p in sorted(ROOT.rglob("*.py"))}


def _unit(module: str) -> str:
    """The layer unit of a module: its sub-package or top-level module under probeplan."""
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else ""


def _targets(module: str, names: list[str], known: set[str]) -> list[str]:
    """The modules an import reaches: ``from probeplan.model import dots`` reaches probeplan.model.dots."""
    reached = [module]
    reached += [f"{module}.{n}" for n in names if f"{module}.{n}" in known]
    return reached


def test_every_module_has_a_layer():
    units = {_unit(m) for m in _graph() if m != "probeplan"}
    assert units <= set(LAYERS), f"place these in LAYERS (and in DEVELOPERS.md): {sorted(units - set(LAYERS))}"


def test_no_upward_import_and_nothing_imports_the_command_line_or_the_page():
    graph = _graph()
    wrong = []
    for module, imports in graph.items():
        if module == "probeplan":
            continue
        low = LAYERS[_unit(module)]
        for target, names, line in imports:
            if target == "probeplan":
                extra = set(names) - TOP_LEVEL_CONSTANTS
                if extra:
                    wrong.append(f"{module}:{line} imports {sorted(extra)} from the top-level package")
                continue
            if target.split(".")[1] == "app" or target.startswith("app"):
                wrong.append(f"{module}:{line} imports the page")
            unit = _unit(target)
            if unit in LAYERS and LAYERS[unit] > low:
                wrong.append(f"{module}:{line} imports {target} (layer {unit} above {_unit(module)})")
    assert not wrong, "\n".join(wrong)


def _cycle(edges: dict[str, set[str]]) -> list[str] | None:
    """One cycle in a directed graph (as a path), or None: depth-first search with three colours."""
    colour = dict.fromkeys(edges, 0)
    stack: list[str] = []

    def visit(node: str) -> list[str] | None:
        colour[node] = 1
        stack.append(node)
        for nxt in sorted(edges.get(node, ())):
            if colour.get(nxt, 2) == 1:
                return stack[stack.index(nxt):] + [nxt]
            if colour.get(nxt) == 0:
                found = visit(nxt)
                if found:
                    return found
        stack.pop()
        colour[node] = 2
        return None

    for node in sorted(edges):
        if colour[node] == 0:
            found = visit(node)
            if found:
                return found
    return None


def test_no_cycle_between_modules():
    graph = _graph()
    known = set(graph)
    edges: dict[str, set[str]] = {m: set() for m in graph if m != "probeplan"}
    for module, imports in graph.items():
        if module == "probeplan":
            continue
        for target, names, _ in imports:
            for reached in _targets(target, names, known):
                # a package's __init__ that holds no imports is not a dependency
                if reached in edges and reached != module and not (module.startswith(reached + ".")):
                    edges[module].add(reached)
    cycle = _cycle(edges)
    assert cycle is None, " -> ".join(cycle or [])


def test_no_cycle_between_sub_packages():
    graph = _graph()
    edges: dict[str, set[str]] = {}
    for module, imports in graph.items():
        if module == "probeplan":
            continue
        here = _unit(module)
        for target, _, _ in imports:
            there = _unit(target)
            if there and there != here:
                edges.setdefault(here, set()).add(there)
                edges.setdefault(there, set())
    cycle = _cycle(edges)
    assert cycle is None, " -> ".join(cycle or [])


@pytest.mark.parametrize(
    ("edges", "has_cycle"),
    [({"a": {"b"}, "b": {"c"}, "c": set()}, False), ({"a": {"b"}, "b": {"c"}, "c": {"a"}}, True),
     ({"a": {"a"}}, True), ({"a": {"b", "c"}, "b": {"c"}, "c": set()}, False)],
)
def test_the_cycle_finder_itself(edges, has_cycle):
    # the check above must be able to fail: a known cycle is found, a diamond is not a cycle
    assert (_cycle(edges) is not None) is has_cycle
