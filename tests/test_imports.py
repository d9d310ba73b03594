"""No import cycles: every module imports on its own, and the package's import graph is acyclic.

Two checks.  One fresh interpreter imports every module of the package alone (``sys.modules``
cleared of ldptransform.* before each), so no module relies on another having been imported
first.  A static check builds the graph of module-level imports between the package's
modules from their source (imports inside functions, under ``if TYPE_CHECKING:`` and
``from __future__`` are not edges) and requires it to be acyclic, printing a cycle if not.
Importing ``a.b.c`` also runs ``a`` and ``a.b``, so an edge goes to the imported module and to
each of its enclosing packages, except those that enclose the importing module itself (they
are already running); an explicit import of an enclosing package (``from . import x``) is an
edge like any other.
"""

from __future__ import annotations

import ast
import json
import pkgutil
import subprocess
import sys
from pathlib import Path

import ldptransform

PACKAGE = "ldptransform"
ROOT = Path(ldptransform.__file__).parent


def all_modules() -> list[str]:
    names = [PACKAGE] + [m.name for m in pkgutil.walk_packages([str(ROOT)], prefix=PACKAGE + ".")]
    return sorted(n for n in names if not n.endswith("__main__"))  # __main__ runs the command line


def module_file(name: str) -> Path:
    rel = Path(*name.split(".")[1:])
    pkg = ROOT / rel / "__init__.py"
    return pkg if pkg.exists() else (ROOT / rel).with_suffix(".py")


def _is_type_checking(test: ast.expr) -> bool:
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING")


def _module_level_imports(tree: ast.Module) -> list[ast.Import | ast.ImportFrom]:
    """Imports run when the module is imported: top level, and inside top-level if/try/with
    blocks (but not under ``if TYPE_CHECKING:``); never inside functions or classes."""
    out: list[ast.Import | ast.ImportFrom] = []
    todo: list[ast.stmt] = list(tree.body)
    while todo:
        node = todo.pop()
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            out.append(node)
        elif isinstance(node, ast.If):
            todo.extend(node.orelse if _is_type_checking(node.test) else node.body + node.orelse)
        elif isinstance(node, ast.Try):
            todo.extend(node.body + node.orelse + node.finalbody + [s for h in node.handlers for s in h.body])
        elif isinstance(node, ast.With):
            todo.extend(node.body)
    return out


def _targets(name: str, is_pkg: bool, node: ast.Import | ast.ImportFrom, modules: set[str]) -> set[str]:
    """The package modules an import statement of module ``name`` imports."""
    if isinstance(node, ast.Import):
        return {a.name for a in node.names if a.name.split(".")[0] == PACKAGE}
    if node.module == "__future__":
        return set()
    if node.level:
        base = name.split(".") if is_pkg else name.split(".")[:-1]
        base = base[: len(base) - (node.level - 1)]
        mod = ".".join(base + ([node.module] if node.module else []))
    else:
        mod = node.module or ""
    if mod.split(".")[0] != PACKAGE:
        return set()
    # ``from pkg import sub`` imports the submodule; ``from pkg import name`` needs pkg itself to have run
    return {f"{mod}.{a.name}" if f"{mod}.{a.name}" in modules else mod for a in node.names}


def import_graph() -> dict[str, set[str]]:
    modules = set(all_modules())
    graph: dict[str, set[str]] = {}
    for name in sorted(modules):
        path = module_file(name)
        is_pkg = path.name == "__init__.py"
        tree = ast.parse(path.read_text(encoding="utf-8"), str(path))
        own_parents = {".".join(name.split(".")[:i]) for i in range(1, name.count(".") + 1)}
        edges: set[str] = set()
        for node in _module_level_imports(tree):
            for target in _targets(name, is_pkg, node, modules):
                parts = target.split(".")
                edges.add(target)  # explicit: even a package enclosing this module (``from . import x``)
                edges.update(p for p in (".".join(parts[:i]) for i in range(1, len(parts)))
                             if p not in own_parents)  # implicit: the enclosing packages not yet running
        graph[name] = {t for t in edges if t in modules and t != name}
    return graph


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """A cycle of the graph as a list of modules (first == last), or None."""
    state: dict[str, int] = {}  # 1: on the current path, 2: done
    path: list[str] = []

    def visit(n: str) -> list[str] | None:
        state[n] = 1
        path.append(n)
        for m in sorted(graph.get(n, ())):
            if state.get(m) == 1:
                return path[path.index(m):] + [m]
            if m not in state:
                found = visit(m)
                if found:
                    return found
        path.pop()
        state[n] = 2
        return None

    for n in sorted(graph):
        if n not in state:
            found = visit(n)
            if found:
                return found
    return None


def test_the_graph_check_finds_a_cycle() -> None:
    """The check can fail: a cycle through three modules is found and printed in order."""
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": set()}) == ["a", "b", "c", "a"]
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": set()}) is None


def test_the_graph_sees_relative_imports_and_enclosing_packages() -> None:
    graph = import_graph()
    assert "ldptransform.errors" in graph["ldptransform.keys"]
    assert "ldptransform.release" in graph["ldptransform.engine_dask"]  # via ldptransform.release.parts
    assert "ldptransform.release.parts" in graph["ldptransform.engine_dask"]


def test_the_import_graph_is_acyclic() -> None:
    cycle = find_cycle(import_graph())
    assert cycle is None, "import cycle: " + " -> ".join(cycle or [])


_CHILD = """
import importlib, json, sys, traceback
failed = {}
for name in json.loads(sys.argv[1]):
    for m in [m for m in sys.modules if m == "ldptransform" or m.startswith("ldptransform.")]:
        del sys.modules[m]
    try:
        importlib.import_module(name)
    except BaseException:
        failed[name] = traceback.format_exc(limit=8)
print(json.dumps(failed))
"""


def test_every_module_imports_on_its_own() -> None:
    modules = all_modules()
    assert len(modules) > 30 and "ldptransform.release.run" in modules and "ldptransform.random.bits" in modules
    proc = subprocess.run([sys.executable, "-c", _CHILD, json.dumps(modules)], capture_output=True, text=True,
                          check=False, timeout=300, cwd=ROOT.parent)
    assert proc.returncode == 0, proc.stderr
    failed = json.loads(proc.stdout.strip().splitlines()[-1])
    assert not failed, "modules that do not import on their own:\n" + "\n".join(
        f"{name}:\n{tb}" for name, tb in failed.items())
