"""No import cycles among the project's modules (`detectors/` and `service/`).

The graph is built with `ast` from every import statement, at the top of a module or inside a
function alike (an import deferred into a function still ties the two modules together, it only
hides the cycle until that function runs); imports under ``if TYPE_CHECKING:`` are left out, as
they never run. Importing a package runs its ``__init__``, so ``from detectors import x`` is an
edge to ``detectors`` (and to ``detectors.x`` when that is a module). The library's two lazy
lookups (the package's public names and the detector registry) import by name at run time; their
edges are added from the tables that drive them.
"""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("detectors", "service")


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def project_modules() -> dict[str, Path]:
    return {
        _module_name(path): path
        for package in PACKAGES
        for path in sorted((ROOT / package).rglob("*.py"))
        if "migrations" not in path.relative_to(ROOT).parts  # run by Alembic, never imported
    }


def _type_checking_only(node: ast.If) -> bool:
    test = node.test
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"
    )


def _imports(tree: ast.AST):
    """Every import node, except those under ``if TYPE_CHECKING:``."""
    for node in ast.iter_child_nodes(tree):
        if isinstance(node, ast.If) and _type_checking_only(node):
            yield from (n for child in node.orelse for n in _imports_in(child))
            continue
        yield from _imports_in(node)


def _imports_in(node: ast.AST):
    if isinstance(node, ast.Import | ast.ImportFrom):
        yield node
    else:
        yield from _imports(node)


def import_graph() -> dict[str, set[str]]:
    """Module -> the project modules it imports."""
    modules = project_modules()
    graph: dict[str, set[str]] = {name: set() for name in modules}
    for name, path in modules.items():
        package = name if path.name == "__init__.py" else name.rpartition(".")[0]
        # A module's own packages are initialised before it runs: only an import of a name
        # from one of them (`from detectors import REGISTRY`) makes an edge to it.
        ancestors = {".".join(name.split(".")[:end]) for end in range(1, name.count(".") + 1)}
        for node in _imports(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                targets = [alias.name for alias in node.names]
            else:
                if node.level:
                    base = package.split(".")
                    base = base[: len(base) - (node.level - 1)]
                    stem = ".".join([*base, node.module] if node.module else base)
                else:
                    stem = node.module or ""
                targets = [
                    f"{stem}.{alias.name}" if f"{stem}.{alias.name}" in modules else stem
                    for alias in node.names
                ]
            for target in targets:
                parts = target.split(".")  # importing a.b.c runs a, a.b and a.b.c
                prefixes = {".".join(parts[:end]) for end in range(1, len(parts))} - ancestors
                for module in prefixes | {target}:
                    if module in modules and module != name:
                        graph[name].add(module)
    for module, targets in _lazy_edges().items():
        graph[module] |= targets
    return graph


def _lazy_edges() -> dict[str, set[str]]:
    import detectors
    from detectors import _registry

    return {
        "detectors": {f"detectors{origin}" for origin in detectors._ORIGINS.values()},
        "detectors._registry": {f"detectors.{name}" for name, _ in _registry._DETECTORS},
    }


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One cycle of the graph as a list of modules (the first repeated at the end), or None."""
    state: dict[str, int] = {}  # 1: on the current path, 2: done
    path: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        path.append(node)
        for target in sorted(graph[node]):
            if state.get(target) == 1:
                return [*path[path.index(target):], target]
            if target not in state and (cycle := visit(target)) is not None:
                return cycle
        path.pop()
        state[node] = 2
        return None

    for node in sorted(graph):
        if node not in state and (cycle := visit(node)) is not None:
            return cycle
    return None


def test_the_graph_sees_the_project():
    graph = import_graph()
    # A few edges any reader can check in the source.
    assert "detectors.instrument" in graph["detectors._base"]
    assert "detectors" not in graph["detectors._base"]  # its own package, initialised first
    assert "detectors._registry" in graph["detectors"]
    assert "detectors" in graph["service.cli"]  # a function-level import counts
    assert "detectors.errors" in graph["detectors._registry"]
    assert "detectors.mahalanobis" in graph["detectors._registry"]  # a lazy lookup counts


def test_find_cycle_finds_one():
    graph = {"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}
    assert find_cycle(graph) == ["a", "b", "c", "a"]
    assert find_cycle({"a": {"b"}, "b": set()}) is None


def test_no_import_cycles():
    cycle = find_cycle(import_graph())
    assert cycle is None, "import cycle: " + " -> ".join(cycle or [])
