"""The import graph of the package: layers, no cycles, emcee in one place.

Every module of the installed package, subpackages included, is parsed with
``ast``; every import counts, also one inside a function body. The layers are
DEVELOPERS.md's: physics <- inference <- pipeline (an arrow points at the layer
that may import the one it starts from). A new top-level module or subpackage
fails ``test_every_module_has_a_layer`` until it is given a layer below.
"""

import ast
import itertools
from importlib import resources
from pathlib import Path

import pytest

ROOT = "sedtemp"
PHYSICS = frozenset({
    "planck", "bands", "opacity", "models", "cmb", "radiation", "fields", "priors",
    "constants", "seeds", "_numerics", "_io", "_units", "_version", "errors",
    "photometry", "simulate", "absorption",
})
INFERENCE = frozenset({
    "likelihood", "fit", "equilibrium", "grains", "emission", "compare", "population",
})
# "__init__" is the package root: it re-exports names from every layer.
PIPELINE = frozenset({
    "pipeline", "maps", "plots", "cli", "inspect_workflow",
    "init_workflow", "cli_show", "__main__", "__init__",
})
LAYERS = {"physics": PHYSICS, "inference": INFERENCE, "pipeline": PIPELINE}
RANK = {"physics": 0, "inference": 1, "pipeline": 2}
# Modules allowed to import emcee: the MCMC fitter and the population model (a module
# or a subpackage). A dotted name allows that module and everything under it.
EMCEE_USERS = ("sedtemp.fit.mcmc", "sedtemp.population")


def _package_dir() -> Path:
    return Path(str(resources.files(ROOT)))


def _discover() -> dict[str, Path]:
    """Dotted module name -> source file, for every .py file of the package tree."""
    base = _package_dir()
    out = {}
    for path in sorted(base.rglob("*.py")):
        rel = path.relative_to(base).with_suffix("")
        parts = rel.parts
        if any(p == "__pycache__" for p in parts):
            continue
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join((ROOT, *parts))] = path
    return out


MODULES = _discover()


def _is_package(name: str) -> bool:
    return MODULES[name].name == "__init__.py"


def _top(name: str) -> str:
    """The top-level name that decides a module's layer ("__init__" for the root)."""
    parts = name.split(".")
    return parts[1] if len(parts) > 1 else "__init__"


def _layer(name: str) -> str | None:
    top = _top(name)
    return next((layer for layer, members in LAYERS.items() if top in members), None)


def _resolve(target: str, names: list[str] | None) -> set[str]:
    """The package modules an import of ``target`` (and ``names`` from it) loads.

    ``from a.b import c`` loads ``a.b.c`` if that is a module, else ``a.b``;
    ``import a.b`` loads ``a.b``. Names outside the package resolve to nothing.
    """
    if target != ROOT and not target.startswith(ROOT + "."):
        return set()
    out = set()
    for name in names or [None]:
        full = f"{target}.{name}" if name else target
        if full in MODULES:
            out.add(full)
            continue
        # an attribute of a module (or a module that does not exist): the longest
        # existing prefix is what gets imported
        parts = target.split(".")
        while parts and ".".join(parts) not in MODULES:
            parts.pop()
        if parts:
            out.add(".".join(parts))
    return out


def _absolute(module: str, level: int, target: str | None) -> str:
    """The absolute name of a relative import made inside ``module``."""
    package = module if _is_package(module) else module.rpartition(".")[0]
    parts = package.split(".")
    if level > 1:
        parts = parts[: len(parts) - (level - 1)]
    return ".".join(parts + ([target] if target else []))


def _import_names(module: str, tree: ast.AST) -> list[tuple[str, int, set[str]]]:
    """(absolute target, line, package modules it loads) for every import in ``tree``."""
    found = []
    for node in ast.walk(tree):  # ast.walk enters function bodies too
        if isinstance(node, ast.Import):
            for alias in node.names:
                found.append((alias.name, node.lineno, _resolve(alias.name, None)))
        elif isinstance(node, ast.ImportFrom):
            target = (_absolute(module, node.level, node.module) if node.level
                      else node.module or "")
            names = [a.name for a in node.names if a.name != "*"]
            found.append((target, node.lineno, _resolve(target, names)))
        elif (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)
              and node.func.attr == "import_module" and node.args
              and isinstance(node.args[0], ast.Constant) and isinstance(node.args[0].value, str)):
            # importlib.import_module("sedtemp.x") with a literal name
            target = node.args[0].value
            found.append((target, node.lineno, _resolve(target, None)))
    return sorted(found, key=lambda f: f[1])  # ast.walk is breadth-first; report in line order


def _parse_all() -> dict[str, list[tuple[str, int, set[str]]]]:
    return {m: _import_names(m, ast.parse(p.read_text(encoding="utf-8"), filename=str(p)))
            for m, p in MODULES.items()}


IMPORTS = _parse_all()


def _graph() -> dict[str, dict[str, int]]:
    """module -> {imported package module: first line}; self-imports dropped."""
    graph: dict[str, dict[str, int]] = {m: {} for m in MODULES}
    for m, imports in IMPORTS.items():
        for _target, line, loaded in imports:
            for dep in loaded - {m}:
                graph[m].setdefault(dep, line)
    return graph


GRAPH = _graph()


def _cycles(graph: dict[str, dict[str, int]]) -> list[tuple[list[str], list[str]]]:
    """(sorted members, one closed path) per strongly connected set of several modules."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    components = []

    def strongconnect(v):  # Tarjan (1972); the graph has a few dozen nodes
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in graph[v]:
            if w not in index:
                strongconnect(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = set()
            while True:
                w = stack.pop()
                on_stack.discard(w)
                comp.add(w)
                if w == v:
                    break
            if len(comp) > 1:
                components.append(comp)

    for v in sorted(graph):
        if v not in index:
            strongconnect(v)
    return [(sorted(c), _path_in(c, graph)) for c in sorted(components, key=min)]


def _path_in(comp: set[str], graph: dict[str, dict[str, int]]) -> list[str]:
    """A shortest closed path through the first module of a strongly connected set."""
    start = min(comp)
    prev = {start: None}
    queue = [start]
    while queue:
        v = queue.pop(0)
        for w in sorted(graph[v]):
            if w == start:
                path = [v]
                while prev[path[-1]] is not None:
                    path.append(prev[path[-1]])
                return [*reversed(path), start]
            if w in comp and w not in prev:
                prev[w] = v
                queue.append(w)
    raise AssertionError(f"no cycle through {start}")  # unreachable for a real component


def _describe(path: list[str]) -> str:
    return " -> ".join(f"{a} (line {GRAPH[a][b]})" for a, b in itertools.pairwise(path)) + f" -> {path[-1]}"


def test_the_package_is_found_and_parsed():
    # the walk sees subpackages and function-level imports, or every other test is vacuous
    assert {"sedtemp", "sedtemp.planck", "sedtemp.fit", "sedtemp.fit.mcmc"} <= MODULES.keys()
    assert "sedtemp.fit.mcmc" in GRAPH["sedtemp.fit"]
    assert any(t == "emcee" for t, _, _ in IMPORTS["sedtemp.fit.mcmc"])


def test_function_level_and_literal_imports_are_seen():
    src = (
        "import numpy as np\n"
        "def f():\n"
        "    from ..pipeline.catalog import read_catalog\n"
        "    import sedtemp.fit.mcmc\n"
        "    class K:\n"
        "        def g(self):\n"
        "            from . import summary\n"
        "    return importlib.import_module('sedtemp.planck')\n"
    )
    found = _import_names("sedtemp.fit.grid", ast.parse(src))
    assert [(t, line) for t, line, _ in found] == [
        ("numpy", 1), ("sedtemp.pipeline.catalog", 3), ("sedtemp.fit.mcmc", 4), ("sedtemp.fit", 7),
        ("sedtemp.planck", 8)]
    assert set().union(*(mods for _, _, mods in found)) == {
        "sedtemp.pipeline.catalog", "sedtemp.fit.mcmc", "sedtemp.fit.summary", "sedtemp.planck"}


def test_relative_imports_resolve_to_package_modules():
    # exact behaviour of the resolver on the three import forms the package uses
    assert _absolute("sedtemp.fit.grid", 2, "priors") == "sedtemp.priors"
    assert _absolute("sedtemp.fit", 1, "mcmc") == "sedtemp.fit.mcmc"
    assert _absolute("sedtemp.planck", 1, None) == "sedtemp"
    assert _resolve("sedtemp.fit", ["mcmc"]) == {"sedtemp.fit.mcmc"}
    assert _resolve("sedtemp.planck", ["planck_nu"]) == {"sedtemp.planck"}
    assert _resolve("sedtemp", ["__version__"]) == {"sedtemp"}
    assert _resolve("numpy", ["ndarray"]) == set()


def test_cycle_finder_reports_a_cycle():
    graph = {"a": {"b": 1}, "b": {"c": 2}, "c": {"a": 3}, "d": {"a": 4}}
    assert _cycles(graph) == [(["a", "b", "c"], ["a", "b", "c", "a"])]
    assert _cycles({"a": {"b": 1}, "b": {}}) == []


@pytest.mark.parametrize("name", sorted(MODULES))
def test_every_module_has_a_layer(name):
    assert _layer(name) is not None, (
        f"{name} ({_top(name)!r}) has no layer: add {_top(name)!r} to PHYSICS, INFERENCE or "
        "PIPELINE in tests/test_layering.py and to the layering list in DEVELOPERS.md")


@pytest.mark.parametrize("name", sorted(m for m in MODULES if _layer(m) in ("physics", "inference")))
def test_no_upward_imports(name):
    bad = _upward(name, GRAPH)
    assert not bad, f"{_layer(name)} module {name} imports upward: {', '.join(bad)}"


def _upward(name: str, graph: dict[str, dict[str, int]]) -> list[str]:
    mine = RANK[_layer(name)]
    return [f"{dep} ({_layer(dep)}, line {line})" for dep, line in sorted(graph[name].items())
            if _layer(dep) is not None and RANK[_layer(dep)] > mine]


def test_upward_import_finder():
    graph = {"sedtemp.planck": {"sedtemp.fit.grid": 7, "sedtemp.errors": 3, "sedtemp": 9},
             "sedtemp.fit.grid": {"sedtemp.planck": 2, "sedtemp.pipeline.config": 5}}
    assert _upward("sedtemp.planck", graph) == ["sedtemp (pipeline, line 9)",
                                                "sedtemp.fit.grid (inference, line 7)"]
    assert _upward("sedtemp.fit.grid", graph) == ["sedtemp.pipeline.config (pipeline, line 5)"]


def test_no_import_cycles():
    cycles = _cycles(GRAPH)
    assert not cycles, "import cycle(s): " + "; ".join(
        f"{', '.join(members)} import each other, e.g. {_describe(path)}" for members, path in cycles)


def test_only_the_mcmc_and_population_modules_import_emcee():
    users = sorted(m for m, imports in IMPORTS.items()
                   if any(t == "emcee" or t.startswith("emcee.") for t, _, _ in imports))
    allowed = [m for m in users if any(m == a or m.startswith(a + ".") for a in EMCEE_USERS)]
    assert users == allowed, f"emcee imported outside {EMCEE_USERS}: {sorted(set(users) - set(allowed))}"
