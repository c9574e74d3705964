"""The folder layout is the architecture: imports inside simpower/ flow one way.

Checks, by reading the source with ``ast`` (nothing is imported):

* the graph of module-level imports between simpower's modules has no cycle, and neither
  has the graph that adds the imports deferred into functions;
* the layering arrows of DEVELOPERS.md hold where they are cheap to state, deferred imports
  included;
* ``import simpower`` does not import the heavy optional libraries (they are imported
  where they are used), checked in a fresh interpreter.

Which imports count (common practice for import-cycle checks): imports executed when a
module is loaded, i.e. at module level, including inside ``try``/``if`` blocks at module
level, but not inside functions or classes' methods (deferred until called) nor under
``if TYPE_CHECKING:`` (never executed). Importing ``simpower.a.b`` is an edge to the module
``simpower/a/b.py`` (or ``simpower/a/b/__init__.py`` for a package); the parent packages
Python initialises on the way are not counted as edges, as every submodule would otherwise
be in a cycle with ``simpower/__init__.py``. ``from pkg import name`` is an edge to
``pkg.name`` if that is a module, else to ``pkg`` itself (the name is read from the
package's ``__init__``).
"""

from __future__ import annotations

import ast
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PKG = ROOT / "simpower"


def _module_files() -> dict[str, Path]:
    """Dotted module name -> file, for every ``.py`` file of the package."""
    out = {}
    for path in sorted(PKG.rglob("*.py")):
        parts = list(path.relative_to(ROOT).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join(parts)] = path
    return out


def _is_type_checking(test: ast.expr) -> bool:
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING")


def _imports(body: list[ast.stmt], deferred: bool = False):
    """The import statements of ``body`` run when the module is loaded.

    Those in compound statements (if, try, with, for, class bodies) count; those under
    ``if TYPE_CHECKING:`` never run; those inside functions run on first call, and count
    only with ``deferred``.
    """
    for node in body:
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            yield node
        elif isinstance(node, ast.If) and _is_type_checking(node.test):
            yield from _imports(node.orelse, deferred)
        elif isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
            if deferred:
                yield from _imports(node.body, deferred)
        else:
            for value in ast.iter_fields(node):
                block = value[1]
                if isinstance(block, list):
                    for item in block:
                        if isinstance(item, ast.stmt):
                            yield from _imports([item], deferred)
                        elif isinstance(item, (ast.excepthandler, ast.match_case)):
                            yield from _imports(item.body, deferred)


def _lazy_modules(tree: ast.Module) -> list[str]:
    """Modules a package's ``__init__`` loads on first use (PEP 562): the keys of its ``_PUBLIC`` table."""
    for node in tree.body:
        if (isinstance(node, ast.Assign) and [getattr(t, "id", None) for t in node.targets] == ["_PUBLIC"]
                and isinstance(node.value, ast.Dict)):
            return [k.value for k in node.value.keys if isinstance(k, ast.Constant) and isinstance(k.value, str)]
    return []


def import_graph(deferred: bool = False) -> dict[str, set[str]]:
    """Module -> the simpower modules it imports at load time (with ``deferred``: or inside functions)."""
    files = _module_files()
    graph: dict[str, set[str]] = {name: set() for name in files}
    for name, path in files.items():
        is_pkg = path.name == "__init__.py"
        package = name if is_pkg else name.rpartition(".")[0]
        tree = ast.parse(path.read_text(), filename=str(path))
        lazy = [f"{package}.{m}" for m in _lazy_modules(tree)] if is_pkg and deferred else []
        for target in lazy:  # names a package loads on first use count as deferred imports
            while target and target not in files:
                target = target.rpartition(".")[0]
            if target and target != name:
                graph[name].add(target)
        for node in _imports(tree.body, deferred):
            if isinstance(node, ast.Import):
                targets = [alias.name for alias in node.names]
            else:
                if node.level:
                    base = package.split(".")
                    base = base[: len(base) - (node.level - 1)]
                    base_name = ".".join(base + ([node.module] if node.module else []))
                else:
                    base_name = node.module or ""
                targets = []
                for alias in node.names:
                    sub = f"{base_name}.{alias.name}"
                    targets.append(sub if sub in files else base_name)
            for target in targets:
                # `import simpower.a.b` names the deepest module that exists
                while target and target not in files:
                    target = target.rpartition(".")[0]
                if target and target != name:
                    graph[name].add(target)
    return graph


def strongly_connected_components(graph: dict[str, set[str]]) -> list[list[str]]:
    """Tarjan's algorithm (Tarjan 1972, SIAM J. Comput. 1(2)), iterative; components of any size."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    on_stack: set[str] = set()
    stack: list[str] = []
    comps: list[list[str]] = []
    counter = 0
    for root in sorted(graph):
        if root in index:
            continue
        work = [(root, iter(sorted(graph[root])))]
        index[root] = low[root] = counter
        counter += 1
        stack.append(root)
        on_stack.add(root)
        while work:
            node, children = work[-1]
            child = next(children, None)
            if child is not None:
                if child not in index:
                    index[child] = low[child] = counter
                    counter += 1
                    stack.append(child)
                    on_stack.add(child)
                    work.append((child, iter(sorted(graph.get(child, ())))))
                elif child in on_stack:
                    low[node] = min(low[node], index[child])
                continue
            work.pop()
            if work:
                parent = work[-1][0]
                low[parent] = min(low[parent], low[node])
            if low[node] == index[node]:
                comp = []
                while True:
                    member = stack.pop()
                    on_stack.discard(member)
                    comp.append(member)
                    if member == node:
                        break
                comps.append(sorted(comp))
    return comps


def _a_cycle(graph: dict[str, set[str]], members: list[str]) -> list[str]:
    """One cycle through the first member of a strongly connected component (breadth-first)."""
    inside = set(members)
    start = members[0]
    previous: dict[str, str] = {}
    frontier = [start]
    while frontier:
        nxt = []
        for node in frontier:
            for child in sorted(graph[node] & inside):
                if child == start:
                    path = [node]
                    while path[-1] != start:
                        path.append(previous[path[-1]])
                    return [start, *reversed(path[:-1]), start] if node != start else [start, start]
                if child not in previous:
                    previous[child] = node
                    nxt.append(child)
        frontier = nxt
    return members


def test_scc_finder_finds_a_planted_cycle():
    # the checker itself must be able to fail: a small graph with one 3-cycle and a tail
    graph = {"a": {"b"}, "b": {"c"}, "c": {"a", "d"}, "d": set(), "e": {"d"}}
    comps = [c for c in strongly_connected_components(graph) if len(c) > 1]
    assert comps == [["a", "b", "c"]]
    assert _a_cycle(graph, comps[0]) == ["a", "b", "c", "a"]
    assert all(len(c) == 1 for c in strongly_connected_components({"a": {"b"}, "b": set()}))


def test_graph_reads_relative_and_package_imports():
    graph = import_graph()
    # `from .analyses.base import Analysis` in simpower/functions.py, `from ..components import` in a base
    assert "simpower.analyses.base" in graph["simpower.functions"]
    assert "simpower.components" in graph["simpower.processes.base"]
    # `from .. import analytic` is an edge to the package simpower/analytic/__init__.py
    assert "simpower.analytic" in graph["simpower.analyses.multiarm"]
    # `from . import _common as c` is an edge to the module, not to the package
    assert graph["simpower.analytic.normal"] == {"simpower.analytic._common"}


def test_graph_counts_names_a_package_loads_on_first_use():
    # simpower/__init__.py and simpower/engine/__init__.py import their public names lazily (PEP 562):
    # the modules of their `_PUBLIC` tables are deferred imports, so the layering checks still see them
    assert import_graph()["simpower.engine"] == set()
    lazy = import_graph(deferred=True)
    assert {"simpower.engine.runner", "simpower.engine.chunk", "simpower.engine.store"} <= lazy["simpower.engine"]
    assert {"simpower.planning.sweep", "simpower.report", "simpower.analyses.ttests"} <= lazy["simpower"]


def test_which_imports_count():
    source = """
import os
from typing import TYPE_CHECKING
if TYPE_CHECKING:
    import hidden
else:
    import shown_else
try:
    import in_try
except ImportError:
    import in_handler
class C:
    import in_class_body
    def method(self):
        import in_method
def f():
    import in_function
"""
    tree = ast.parse(source)

    def names(deferred):
        return {node.module if isinstance(node, ast.ImportFrom) else node.names[0].name
                for node in _imports(tree.body, deferred)}

    load_time = {"os", "typing", "shown_else", "in_try", "in_handler", "in_class_body"}
    assert names(False) == load_time
    assert names(True) == load_time | {"in_method", "in_function"}


def _cycles_message(graph):
    cycles = [c for c in strongly_connected_components(graph) if len(c) > 1]
    return cycles, "\n".join(f"cycle among {len(c)} modules {c}: " + " -> ".join(_a_cycle(graph, c)) for c in cycles)


def test_no_import_cycles():
    cycles, msg = _cycles_message(import_graph())
    assert not cycles, "import cycles inside simpower/ (module-level imports):\n" + msg


def test_no_import_cycles_through_deferred_imports():
    # an import moved into a function only postpones a cycle: the parts still depend on each other
    cycles, msg = _cycles_message(import_graph(deferred=True))
    assert not cycles, "import cycles inside simpower/ (counting imports inside functions):\n" + msg


ABOVE_ENGINE = ("simpower.cli", "simpower.report", "simpower.planning")
REPORT_BELOW_PLOTS = ("simpower.report.build", "simpower.report.document", "simpower.report.html",
                      "simpower.report.markdown", "simpower.report.manifest")
ENGINE_AND_ABOVE = ABOVE_ENGINE + ("simpower.engine", "simpower.scenario", "simpower.scenario_files")
# part -> the parts it must not import, counting deferred imports (DEVELOPERS.md, "Imports flow one way":
# cli -> report/planning -> engine -> processes/analyses -> analytic)
FORBIDDEN = {
    "simpower.analytic": ENGINE_AND_ABOVE + ("simpower.processes", "simpower.analyses", "simpower.components",
                                             "simpower.registry", "simpower.functions", "simpower.result"),
    "simpower.processes": ENGINE_AND_ABOVE + ("simpower.analyses", "simpower.functions", "simpower.result"),
    "simpower.analyses": ENGINE_AND_ABOVE + ("simpower.processes", "simpower.functions", "simpower.result"),
    "simpower.components": ENGINE_AND_ABOVE + ("simpower.processes", "simpower.analyses", "simpower.functions"),
    "simpower.registry": ENGINE_AND_ABOVE + ("simpower.processes", "simpower.analyses", "simpower.functions",
                                             "simpower.components"),
    "simpower.summaries": ENGINE_AND_ABOVE + ("simpower.result",),
    # the result's plot() draws with the figure helpers (report.plots, which imports nothing of simpower's but
    # the errors); every other part of the report stays above it
    "simpower.result": tuple(p for p in ENGINE_AND_ABOVE if p != "simpower.report") + REPORT_BELOW_PLOTS,
    "simpower.engine": ABOVE_ENGINE,
    # the results' plot methods may draw with the figure helpers (report.plots imports nothing of planning)
    "simpower.planning": ("simpower.cli",) + REPORT_BELOW_PLOTS,
    "simpower.report": ("simpower.cli",),
}


def _is_in(module: str, part: str) -> bool:
    return module == part or module.startswith(part + ".")


def test_a_forbidden_arrow_would_be_caught():
    # the layering check itself must be able to fail: the engine does import the analyses' base
    graph = import_graph(deferred=True)
    assert any(_is_in(d, "simpower.analyses") for d in graph["simpower.engine.chunk"])


@pytest.mark.parametrize("part", sorted(FORBIDDEN))
def test_layering_arrows(part):
    graph = import_graph(deferred=True)
    bad = [f"{module} imports {dep}" for module, deps in sorted(graph.items()) if _is_in(module, part)
           for dep in sorted(deps) if any(_is_in(dep, f) for f in FORBIDDEN[part])]
    assert not bad, f"{part} imports a part above it:\n" + "\n".join(bad)


def test_commands_do_not_import_each_other():
    # steps shared by several commands live in cli/common.py and cli/steps.py
    graph = import_graph(deferred=True)
    commands = [m for m in graph if m.startswith("simpower.cli.cmd_")]
    assert len(commands) >= 5
    bad = [f"{m} imports {d}" for m in sorted(commands) for d in sorted(graph[m]) if d in commands]
    assert not bad, "\n".join(bad)


def test_registry_and_version_are_leaves():
    # everything registers into the registry and reads the version: they import nothing of simpower's
    # but the errors
    graph = import_graph(deferred=True)
    assert graph["simpower.registry"] <= {"simpower.errors"}
    assert graph["simpower._version"] == set()


def test_batch_module_is_a_leaf():
    # processes build batches and analyses read their layouts: both import it, so it imports nothing of theirs
    graph = import_graph(deferred=True)
    assert graph["simpower.batch"] == set()
    assert "simpower.batch" in graph["simpower.processes.base"] and "simpower.batch" not in graph["simpower.analyses.base"]


def private_cross_imports(module: str, source: str, files) -> list[str]:
    """``from .other import _name`` in ``module`` where ``other`` is another module of the same package.

    Private modules (``from . import _kernels``) are allowed: a module whose name starts with an
    underscore is the package's internal part; private names of a sibling module are not.
    """
    package = module.rpartition(".")[0]
    bad = []
    for node in _imports(ast.parse(source).body, deferred=True):
        if not isinstance(node, ast.ImportFrom) or node.level != 1 or not node.module:
            continue
        target = f"{package}.{node.module}"
        if target == module or target not in files:
            continue
        bad += [f"{module} imports {alias.name} from {target}" for alias in node.names
                if alias.name.startswith("_") and f"{target}.{alias.name}" not in files]
    return bad


def test_private_cross_import_finder_finds_a_planted_one():
    files = {"simpower.analyses.a": None, "simpower.analyses.b": None, "simpower.analyses._k": None}
    src = "from .b import _helper, public\nfrom . import _k\ndef f():\n    from .b import _late\n"
    assert private_cross_imports("simpower.analyses.a", src, files) == [
        "simpower.analyses.a imports _helper from simpower.analyses.b",
        "simpower.analyses.a imports _late from simpower.analyses.b"]


def test_analyses_do_not_import_each_others_private_helpers():
    # shared helpers live in analyses/numeric.py (numbers) and analyses/base.py (the contract)
    files = _module_files()
    bad = [line for name, path in sorted(files.items()) if name.startswith("simpower.analyses.")
           for line in private_cross_imports(name, path.read_text(), files)]
    assert not bad, "\n".join(bad)


HEAVY = ("statsmodels", "matplotlib", "dask", "distributed", "numba")


def test_import_simpower_is_light():
    # the heavy optional libraries are imported where they are used, not at start-up; the package loads
    # its public names on first use, so every one of them is touched here (but make_report: matplotlib)
    code = ("import sys, simpower; "
            "[getattr(simpower, name) for name in simpower.__all__ if name != 'make_report']; "
            f"print(' '.join(m for m in {HEAVY!r} if any(k == m or k.startswith(m + '.') for k in sys.modules)))")
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, cwd=ROOT,
                         check=True)
    assert out.stdout.split() == [], f"`import simpower` imported: {out.stdout.strip()}"


def test_registry_lookup_is_light():
    # the registry imports every module of processes/ and analyses/: they must be light at import too
    code = ("import sys, simpower.registry as r; r.load_builtins(); "
            f"print(' '.join(m for m in {HEAVY!r} if any(k == m or k.startswith(m + '.') for k in sys.modules)))")
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, cwd=ROOT,
                         check=True)
    assert out.stdout.split() == [], f"loading the built-in components imported: {out.stdout.strip()}"
