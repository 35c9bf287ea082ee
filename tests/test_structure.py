"""The house: layers import downward only, no import cycles, no bare top-level package names, labels in one table.

Every module of the four folders is parsed with ``ast`` (nothing is imported); relative imports
are resolved to ``capsweep.*`` names with the folder map of pyproject.toml. Imports inside
functions and ``if TYPE_CHECKING:`` blocks count too. The engine table's ``module:function``
strings are not imports. ``from package import name`` is an edge to ``package.name`` when that
is a module, else to ``package``. Status labels and cluster kinds are spelled as string constants only in
``capsweep/flags.py`` and ``capsweep/clusters.py``.
"""

from __future__ import annotations

import ast
from functools import cache
from pathlib import Path

from capsweep.clusters import NAMES as CLUSTER_KINDS
from capsweep.flags import STATUSES

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = {"capsweep": "capsweep", "sweeps": "capsweep.sweeps", "runners": "capsweep.runners",
            "results_schema": "capsweep.results_schema"}
"""Folder -> import path (pyproject's [tool.setuptools.package-dir])."""
BARE = {"sweeps", "runners", "results_schema"}
"""Folder names that are not importable on their own: only as subpackages of capsweep."""
FOUNDATIONS = ("capsweep.errors", "capsweep.registry", "capsweep.engines", "capsweep.clusters", "capsweep.flags",
               "capsweep.axes", "capsweep.locks")
LAYERS = ("capsweep.sweeps", "capsweep.runners", "capsweep.results_schema")

Graph = dict[str, set[str]]


def _within(module: str, packages: tuple[str, ...]) -> bool:
    return any(module == p or module.startswith(p + ".") for p in packages)


def _module_name(path: Path) -> str:
    rel = path.relative_to(ROOT)
    parts = [PACKAGES[rel.parts[0]], *rel.parts[1:-1]]
    if path.stem != "__init__":
        parts.append(path.stem)
    return ".".join(parts)


def _targets(node: ast.Import | ast.ImportFrom, package: str, modules: set[str]) -> set[str]:
    """Absolute names of what one import statement imports (project modules, or a bare first name)."""
    if isinstance(node, ast.Import):
        return {alias.name for alias in node.names}
    if node.level:
        base = package.split(".")[:len(package.split(".")) - node.level + 1]
        source = ".".join(base + ([node.module] if node.module else []))
    else:
        source = node.module or ""
    submodules = {f"{source}.{alias.name}" for alias in node.names} & modules
    attributes = len(submodules) < len(node.names)
    return submodules | ({source} if attributes else set())


def _imports(path: Path, modules: set[str]) -> set[str]:
    """The project modules ``path`` imports, plus any import whose first name is a bare folder name."""
    name = _module_name(path)
    package = name if path.stem == "__init__" else name.rpartition(".")[0]
    found = set()
    for node in ast.walk(ast.parse(path.read_text(), filename=str(path))):
        if isinstance(node, ast.Import | ast.ImportFrom):
            found |= _targets(node, package, modules)
    return {m for m in found if m in modules or m.split(".")[0] in BARE} - {name}


@cache
def _graph() -> Graph:
    paths = [p for folder in PACKAGES for p in (ROOT / folder).rglob("*.py")]
    modules = {_module_name(p) for p in paths}
    return {_module_name(p): _imports(p, modules) for p in paths}


def find_cycle(graph: Graph) -> list[str]:
    """One import cycle of ``graph`` (module -> imported modules), first module repeated at the end, or []."""
    state: dict[str, int] = {}  # 1: on the current path, 2: done
    stack: list[str] = []

    def visit(node: str) -> list[str]:
        state[node] = 1
        stack.append(node)
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == 1:
                return stack[stack.index(nxt):] + [nxt]
            if nxt not in state and (cycle := visit(nxt)):
                return cycle
        stack.pop()
        state[node] = 2
        return []

    for node in sorted(graph):
        if node not in state and (cycle := visit(node)):
            return cycle
    return []


def _offenders(importers: tuple[str, ...], forbidden: tuple[str, ...]) -> dict[str, list[str]]:
    """Modules within ``importers`` that import something within ``forbidden``, with what they import."""
    bad = {m: sorted(d for d in deps if _within(d, forbidden))
           for m, deps in _graph().items() if _within(m, importers)}
    return {m: deps for m, deps in bad.items() if deps}


def test_the_cycle_finder_finds_a_cycle_and_accepts_a_tree() -> None:
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == ["a", "b", "c", "a"]
    assert find_cycle({"x": {"y"}, "y": {"x"}}) == ["x", "y", "x"]
    assert find_cycle({"a": {"b", "c"}, "b": {"c"}, "c": set()}) == []  # a diamond is no cycle


def test_the_graph_sees_relative_nested_and_function_level_imports() -> None:
    """Edges read from the sources as they stand: a parser that found nothing would pass every rule below."""
    graph = _graph()
    assert "capsweep.registry" in graph["capsweep.runners.builds"]  # from ..registry import flatten
    assert {"capsweep.runners.protocol", "capsweep.runners.rules"} <= graph["capsweep.runners.model"]  # from . import
    assert "capsweep.runners.builds" in graph["capsweep.sweeps.cli"]  # inside a function
    assert "capsweep.engines" in graph["capsweep.sweeps.workload"]  # from .. import engines
    assert "capsweep" not in graph["capsweep.sweeps.workload"]


def test_runners_and_store_never_import_the_front_end() -> None:
    bad = _offenders(("capsweep.runners", "capsweep.results_schema"), ("capsweep.sweeps",))
    assert not bad, f"runners/ and results_schema/ must not import from sweeps/: {bad}"


def test_foundations_import_no_layer_above_them() -> None:
    bad = _offenders(FOUNDATIONS, LAYERS)
    assert not bad, f"foundation modules import from a layer above them: {bad}"


def test_no_import_cycle() -> None:
    cycle = find_cycle(_graph())
    assert not cycle, "import cycle: " + " -> ".join(cycle)


def test_no_bare_top_level_package_names() -> None:
    bare = {m: sorted(d for d in deps if d.split(".")[0] in BARE) for m, deps in _graph().items()}
    bare = {m: deps for m, deps in bare.items() if deps}
    assert not bare, f"import these as capsweep.sweeps/.runners/.results_schema, not bare: {bare}"


# --- labels spelled in one table --------------------------------------------------------------------------------

LABEL_TABLES = {"capsweep.flags": STATUSES, "capsweep.clusters": CLUSTER_KINDS}
"""Each table of labels: the module that spells them; every other module uses its names (flags.DONE, clusters.LOCAL,
clusters.KINDS, ...)."""


def spelled_labels(source: str, labels: frozenset[str]) -> list[tuple[int, str]]:
    """(line, label) of every string constant in ``source`` that is exactly one of ``labels``.

    Words of a sentence (docstrings, messages) are not constants of their own. A key looked up in a mapping
    (``execution["scheduler"]``: the config key of that name, not the cluster kind) is not a label either.
    """
    tree = ast.parse(source)
    keys = {id(node.slice) for node in ast.walk(tree) if isinstance(node, ast.Subscript)}
    return [(node.lineno, node.value) for node in ast.walk(tree) if isinstance(node, ast.Constant)
            and isinstance(node.value, str) and node.value in labels and id(node) not in keys]


def test_the_label_scan_catches_a_planted_literal() -> None:
    planted = 'def waiting(status):\n    """Points not yet run."""\n    return status == "pending" or kind == "slurm"\n'
    assert spelled_labels(planted, frozenset({*STATUSES, *CLUSTER_KINDS})) == [(3, "pending"), (3, "slurm")]
    assert spelled_labels('columns = ("capacity", "failed")\n', frozenset(STATUSES)) == [(1, "failed")]
    assert spelled_labels('message = f"{n} points pending"\n', frozenset(STATUSES)) == []  # words in text are fine
    assert spelled_labels('address = execution["scheduler"]\n', frozenset(CLUSTER_KINDS)) == []  # a config key


def test_status_labels_and_cluster_kinds_are_spelled_only_in_their_tables() -> None:
    labels = frozenset(label for table in LABEL_TABLES.values() for label in table)
    found = {}
    for path in (p for folder in PACKAGES for p in (ROOT / folder).rglob("*.py")):
        if _module_name(path) not in LABEL_TABLES and (spelled := spelled_labels(path.read_text(), labels)):
            found[str(path.relative_to(ROOT))] = spelled
    assert not found, f"use the names of capsweep.flags / capsweep.clusters instead of these literals: {found}"
