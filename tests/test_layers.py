"""The package layout holds: imports point one way, no module imports itself round a cycle,
each outside library stays in its one layer, and no module grows past 500 lines.

Every module under ``mapper/`` is parsed with :mod:`ast` (nothing is imported), so a
violation is caught even in code no test runs. Imports anywhere in a module count: at
module level, inside functions (the lazy imports that keep start-up quick), relative and
absolute. ``from package import name`` is an edge to the submodule ``package.name`` when
that module exists, else to ``package`` itself. Imports under ``if TYPE_CHECKING:`` never
run: they count for the layer direction (a type is still a dependency) but not for cycles.

Layers (common practice for a layered package; the rule of DEVELOPERS.md):
``app -> presentation -> analysis -> identification``; ``store`` is reached from ``app``
and from batch fitting (``identification/fitting``) only; the shared top-level modules
(``errors``, ``constants``, ``columns``, ``signals``, ``records``) import no layer.
``demo`` (sample scenario and bench) sits beside ``app`` and may use any layer. The root
``mapper/__init__.py`` is the public facade over all layers and is exempt.
"""

from __future__ import annotations

import ast
from dataclasses import dataclass
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "mapper"
MAX_LINES = 500
LAYERS = ("store", "identification", "analysis", "presentation", "app", "demo")
SHARED = ("errors", "constants", "columns", "signals", "records")

# layer -> layers it must not import
FORBIDDEN = {
    "store": {"identification", "analysis", "presentation", "app", "demo"},
    "identification": {"store", "analysis", "presentation", "app", "demo"},
    "analysis": {"store", "presentation", "app", "demo"},
    "presentation": {"store", "app", "demo"},
    "shared": set(LAYERS),
}
# the one exception: batch fitting reads tests from the store and writes fits back
ALLOWED = {("mapper.identification.fitting", "mapper.store.database")}
# outside library -> the one package allowed to import it
LIBRARY_HOME = {
    "duckdb": "mapper.store",
    "altair": "mapper.presentation",
    "vl_convert": "mapper.presentation",
    "typer": "mapper.app.cli",
}


@dataclass(frozen=True)
class Import:
    source: str  # importing module
    target: str  # imported module (mapper-internal or top-level outside name)
    line: int
    type_only: bool


def module_name(path: Path, root: Path = PACKAGE) -> str:
    parts = list(path.relative_to(root.parent).with_suffix("").parts)
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def type_only_nodes(tree: ast.AST) -> set[int]:
    """ids of the import nodes inside ``if TYPE_CHECKING:`` (or ``typing.TYPE_CHECKING``)."""
    found: set[int] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.If):
            test = node.test
            name = test.id if isinstance(test, ast.Name) else getattr(test, "attr", None)
            if name == "TYPE_CHECKING":
                for stmt in node.body:
                    found.update(id(n) for n in ast.walk(stmt))
    return found


def imports_of(path: Path, modules: set[str], root: Path = PACKAGE) -> list[Import]:
    """Every import statement of one file, resolved to module names."""
    name = module_name(path, root)
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    type_only = type_only_nodes(tree)
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            targets = [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - node.level + 1]
                origin = ".".join(base + ([node.module] if node.module else []))
            else:
                origin = node.module or ""
            targets = [f"{origin}.{alias.name}" if f"{origin}.{alias.name}" in modules else origin
                       for alias in node.names]
        else:
            continue
        found += [Import(name, target, node.lineno, id(node) in type_only) for target in targets]
    return found


def scan(root: Path = PACKAGE) -> tuple[dict[str, Path], list[Import]]:
    files = {module_name(p, root): p for p in sorted(root.rglob("*.py"))}
    modules = set(files)
    edges = [edge for path in files.values() for edge in imports_of(path, modules, root)]
    return files, edges


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One cycle of the directed graph as ``[a, b, ..., a]``, or None (depth-first search)."""
    state: dict[str, int] = {}  # 1 on the current path, 2 done
    path: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        path.append(node)
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == 1:
                return path[path.index(nxt):] + [nxt]
            if nxt not in state:
                cycle = visit(nxt)
                if cycle:
                    return cycle
        path.pop()
        state[node] = 2
        return None

    for start in sorted(graph):
        if start not in state:
            cycle = visit(start)
            if cycle:
                return cycle
    return None


def layer_of(module: str) -> str | None:
    parts = module.split(".")
    if parts[0] != "mapper" or len(parts) < 2:
        return None  # outside the package, or the root facade
    return "shared" if parts[1] in SHARED else parts[1] if parts[1] in LAYERS else None


def internal_graph(edges: list[Import]) -> dict[str, set[str]]:
    graph: dict[str, set[str]] = {}
    for edge in edges:
        if edge.target.startswith("mapper") and not edge.type_only and edge.target != edge.source:
            graph.setdefault(edge.source, set()).add(edge.target)
    return graph


def layer_violations(edges: list[Import]) -> list[str]:
    bad = []
    for edge in edges:
        source, target = layer_of(edge.source), layer_of(edge.target)
        if source is None or target is None or (edge.source, edge.target) in ALLOWED:
            continue
        if target in FORBIDDEN.get(source, ()):
            bad.append(f"{edge.source} (line {edge.line}) imports {edge.target}: {source} must not import {target}")
    return bad


def library_violations(edges: list[Import]) -> list[str]:
    bad = []
    for edge in edges:
        library = edge.target.split(".")[0]
        home = LIBRARY_HOME.get(library)
        if home and not (edge.source == home or edge.source.startswith(home + ".")):
            bad.append(f"{edge.source} (line {edge.line}) imports {library}: only {home} may")
    return bad


def long_modules(files: dict[str, Path]) -> list[str]:
    lengths = {name: len(path.read_text(encoding="utf-8").splitlines()) for name, path in files.items()}
    return [f"{name}: {n} lines" for name, n in sorted(lengths.items()) if n > MAX_LINES]


@pytest.fixture(scope="module")
def package():
    return scan()


# -- the package as it is -----------------------------------------------------------------------
def test_scan_sees_the_whole_package(package):
    files, edges = package
    assert {"mapper", "mapper.store.database", "mapper.identification.identify", "mapper.app.cli",
            "mapper.app.cli.common", "mapper.presentation.charts"} <= set(files)
    # imports inside functions are seen (the command line loads the store lazily)
    lazy = [e for e in edges if e.source == "mapper.app.cli.common" and e.target == "mapper.app.session"]
    assert any(not e.type_only for e in lazy) and any(e.type_only for e in lazy)
    # the one allowed store access is really there, so the exception is not stale
    assert any((e.source, e.target) in ALLOWED for e in edges)


def test_no_import_cycle(package):
    _, edges = package
    cycle = find_cycle(internal_graph(edges))
    assert cycle is None, "import cycle: " + " -> ".join(cycle or [])


def test_layers_import_one_way(package):
    _, edges = package
    bad = layer_violations(edges)
    assert bad == [], "\n".join(bad)


def test_outside_libraries_stay_in_their_layer(package):
    _, edges = package
    bad = library_violations(edges)
    assert bad == [], "\n".join(bad)
    # and each is really used where it belongs (the rule is not vacuous)
    used = {e.target.split(".")[0] for e in edges}
    assert set(LIBRARY_HOME) <= used


def test_no_module_over_500_lines(package):
    files, _ = package
    long = long_modules(files)
    assert long == [], "split these modules: " + ", ".join(long)


# -- the checks catch what they are meant to catch -------------------------------------------------
def _write(root: Path, files: dict[str, str]) -> Path:
    for name, text in files.items():
        path = root / "mapper" / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text, encoding="utf-8")
    return root / "mapper"


def test_checks_catch_a_planted_violation_of_each_rule(tmp_path):
    root = _write(tmp_path, {
        "__init__.py": "",
        "constants.py": "",
        "store/__init__.py": "",
        "store/database.py": "import duckdb\n",
        "identification/__init__.py": "",
        "identification/fitting.py": "from mapper.store.database import Store\n",
        "identification/models.py": "from ..analysis import trends\n",  # relative, wrong way
        "analysis/__init__.py": "",
        "analysis/trends.py": "def f():\n    from mapper.identification import models\n",  # cycle via a function
        "presentation/__init__.py": "",
        "presentation/charts.py": "import altair as alt\n",
        "app/__init__.py": "",
        "app/cli/__init__.py": "import typer\n",
        "app/jobs.py": "import altair\nfrom typing import TYPE_CHECKING\nif TYPE_CHECKING:\n"
                       "    from mapper.app import views\n",
        "app/views.py": "from mapper.app import jobs\n" + "x = 1\n" * MAX_LINES,
    })
    files, edges = scan(root)
    assert layer_violations(edges) == [
        "mapper.identification.models (line 1) imports mapper.analysis.trends: "
        "identification must not import analysis"]
    assert library_violations(edges) == ["mapper.app.jobs (line 1) imports altair: only mapper.presentation may"]
    assert long_modules(files) == [f"mapper.app.views: {MAX_LINES + 1} lines"]
    cycle = find_cycle(internal_graph(edges))
    assert cycle == ["mapper.analysis.trends", "mapper.identification.models", "mapper.analysis.trends"]
    # the type-only import views -> jobs -> views is not a cycle at run time
    graph = internal_graph(edges)
    assert "mapper.app.views" not in graph.get("mapper.app.jobs", set())


def test_store_may_not_reach_up_and_shared_modules_import_no_layer(tmp_path):
    root = _write(tmp_path, {
        "__init__.py": "",
        "columns.py": "from mapper.store import schema\n",
        "store/__init__.py": "",
        "store/schema.py": "from mapper.columns import x\nfrom mapper import presentation\n",
        "presentation/__init__.py": "",
    })
    _, edges = scan(root)
    assert layer_violations(edges) == [
        "mapper.columns (line 1) imports mapper.store.schema: shared must not import store",
        "mapper.store.schema (line 2) imports mapper.presentation: store must not import presentation",
    ]
