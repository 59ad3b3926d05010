"""The package's layers point only down, and its imports form no cycle.

The import graph is drawn from the source with :mod:`ast` (every ``import`` and ``from ...
import`` statement, at module level and inside functions, plus ``importlib.import_module``
with a constant name), one node per module of ``tracechain``. Each module belongs to one layer
of :data:`LAYERS`, lowest first; a module may import its own layer and the layers below it.
An import that points up a layer is a violation unless it is in :data:`ALLOWED_UPWARD`, the
known violations still to be fixed: that list only shrinks (a stale entry fails the test too).
Cycles are looked for with networkx (``find_cycle``, ``simple_cycles``) as the oracle, and the
``ast`` reading of import statements is checked against the bytecode scanner of the standard
library's :mod:`modulefinder` (a second, independent reading of the same statements).

Where a new module goes: a new input format under ``tracechain/ingest/``; a new analysis under
``tracechain/analyze/`` (results only: no formatting, no writing, no reading of files); a new
output format under ``tracechain/report/``; a new rule under ``tracechain/check/``; a new
command's handler in a ``commands`` module. A new top-level module must be added to
:data:`LAYERS` (the test names it).
"""

from __future__ import annotations

import ast
import modulefinder
import types
from pathlib import Path

import networkx as nx
import pytest

REPO = Path(__file__).resolve().parent.parent
PACKAGE = "tracechain"

#: Lowest first. A module belongs to the layer of the longest name below that matches it
#: (the module itself or a package holding it; the package root matches only itself);
#: imports may point to the same layer or down.
LAYERS: list[tuple[str, tuple[str, ...]]] = [
    # value types crossing the seams (EventChunk, TransitionCounts), errors and small helpers
    # that import nothing above them; ingest's counts-kind parsers (edge lists) and the SQL
    # engines produce TransitionCounts, so the seam type sits below every stage
    ("base", ("tracechain.errors", "tracechain.events", "tracechain.counts", "tracechain._arrowutil",
              "tracechain._bytewords", "tracechain._yamlsafe", "tracechain._version", "tracechain.privacy",
              "tracechain.display", "tracechain.files", "tracechain.durations",
              "tracechain.renderers", "tracechain._limits")),
    ("ingest", ("tracechain.ingest", "tracechain.progress")),
    ("shape", ("tracechain.shape",)),
    # read + shape + count wired together (in Python, or inside a database engine)
    ("pipeline", ("tracechain.pipeline", "tracechain.engines")),
    ("chain", ("tracechain.chain",)),
    ("analyze", ("tracechain.analyze",)),
    ("report", ("tracechain.report",)),
    ("check", ("tracechain.check",)),
    # what every command shares: exit statuses, option types, options -> shaping, counts
    ("options", ("tracechain.options", "tracechain.outputs")),
    ("commands", ("tracechain.analyze.commands", "tracechain.report.commands", "tracechain.check.command",
                  "tracechain.analyze.steps_command")),
    # the entry points: the command line, the pytest plugin, and the package root, which
    # re-exports the public API and wires the layers together (as any import of a
    # submodule runs it first, nothing below may import it: the version is in _version)
    ("cli", ("tracechain.cli", "tracechain.__main__", "tracechain.pytest_plugin", "tracechain")),
]

#: Known upward imports still to be fixed, as (importer, imported). Shrinks with each fix.
ALLOWED_UPWARD: set[tuple[str, str]] = set()

#: Old names kept working where they moved up a layer: (module, new home), imported only in the
#: module's ``__getattr__`` on first use of the old name. For the code other branches wrote before
#: the move; to be removed once nothing uses the old names (follow-up).
COMPAT_FORWARDS: set[tuple[str, str]] = set()

#: Known imports inside one layer that close a cycle, still to be fixed. Shrinks too.
ALLOWED_CYCLE: set[tuple[str, str]] = set()


# -- the graph -------------------------------------------------------------------------------
def package_modules(root: Path, package: str) -> dict[str, tuple[Path, bool]]:
    """Module name -> (file, is a package) for every ``.py`` file of ``package`` under ``root``."""
    mods = {}
    for path in sorted((root / package).rglob("*.py")):
        parts = list(path.relative_to(root).with_suffix("").parts)
        is_pkg = parts[-1] == "__init__"
        if is_pkg:
            parts = parts[:-1]
        mods[".".join(parts)] = (path, is_pkg)
    return mods


def _import_statements(tree: ast.AST) -> list[tuple[int, str, tuple[str, ...], int]]:
    """(level, module, names, line) of every import statement in ``tree`` (at any depth);
    ``names`` is empty for ``import x``."""
    out = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out.extend((0, a.name, (), node.lineno) for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            out.append((node.level, node.module or "", tuple(a.name for a in node.names), node.lineno))
    return out


def _dynamic_imports(tree: ast.AST) -> list[tuple[int, str, tuple[str, ...], int]]:
    """``importlib.import_module("constant")`` calls, in the form of :func:`_import_statements`."""
    out = []
    for node in ast.walk(tree):
        if (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)
                and node.func.attr == "import_module" and isinstance(node.func.value, ast.Name)
                and node.func.value.id == "importlib" and node.args
                and isinstance(node.args[0], ast.Constant) and isinstance(node.args[0].value, str)):
            out.append((0, node.args[0].value, (), node.lineno))
    return out


def _absolute(module: str, is_pkg: bool, level: int, name: str) -> str:
    if not level:
        return name
    base = module.split(".") if is_pkg else module.split(".")[:-1]
    base = base[: len(base) - (level - 1)]
    return ".".join(base + ([name] if name else []))


def _owner(name: str, mods) -> str | None:
    """The module of ``mods`` that ``name`` (a module or a name inside one) belongs to."""
    while name and name not in mods:
        name = name.rpartition(".")[0]
    return name or None


def _forwarding_lines(tree: ast.Module) -> set[int]:
    """Lines of the imports inside a module-level ``__getattr__`` (PEP 562): an old name
    forwarded, on first use, to where it moved."""
    return {n.lineno for f in tree.body if isinstance(f, ast.FunctionDef) and f.name == "__getattr__"
            for n in ast.walk(f) if isinstance(n, (ast.Import, ast.ImportFrom))}


def import_graph(root: Path = REPO, package: str = PACKAGE) -> nx.DiGraph:
    """One node per module; an edge a -> b where a imports from b, with the attributes ``line``
    (the first import) and ``forward`` (every import of b is in a module ``__getattr__``)."""
    mods = package_modules(root, package)
    g = nx.DiGraph()
    g.add_nodes_from(mods)
    for mod, (path, is_pkg) in mods.items():
        tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
        forwarding = _forwarding_lines(tree)
        for level, name, names, line in _import_statements(tree) + _dynamic_imports(tree):
            target = _absolute(mod, is_pkg, level, name)
            if not (target == package or target.startswith(package + ".")):
                continue
            # ``from pkg import sub``: the submodule when there is one, else pkg itself
            subs = [f"{target}.{n}" for n in names if f"{target}.{n}" in mods]
            others = not names or len(subs) < len(names)
            for dest in subs + ([_owner(target, mods)] if others else []):
                if not dest or dest == mod:
                    continue
                if g.has_edge(mod, dest):
                    g.edges[mod, dest]["forward"] &= line in forwarding
                else:
                    g.add_edge(mod, dest, line=line, forward=line in forwarding)
    return g


def layer_of(module: str) -> int:
    best, best_len = None, -1
    for i, (_, names) in enumerate(LAYERS):
        for n in names:
            # the package root names itself only, so that a new top-level module has no layer
            if (module == n or (n != PACKAGE and module.startswith(n + "."))) and len(n) > best_len:
                best, best_len = i, len(n)
    return best


def upward_edges(g: nx.DiGraph, layer=layer_of) -> set[tuple[str, str]]:
    # a module without a layer is reported by test_every_module_has_a_layer
    return {(a, b) for a, b in g.edges if None not in (layer(a), layer(b)) and layer(b) > layer(a)}


def figures(g: nx.DiGraph, layer=layer_of) -> dict:
    """Modules, arrows, arrows back up a layer (and how many of them are old names forwarded in a
    module ``__getattr__``), and circles (strongly connected groups of more
    than one module) with the number of simple cycles through them."""
    circles = [c for c in nx.strongly_connected_components(g) if len(c) > 1]
    return {"modules": g.number_of_nodes(), "arrows": g.number_of_edges(),
            "upward": len(upward_edges(g, layer)),
            "upward_forwards_only": sum(1 for e in upward_edges(g, layer) if g.edges[e].get("forward")),
            "circles": len(circles),
            "simple_cycles": sum(1 for _ in nx.simple_cycles(g))}


# -- the package ----------------------------------------------------------------------------
@pytest.fixture(scope="module")
def graph():
    return import_graph()


def test_every_module_has_a_layer(graph):
    missing = sorted(m for m in graph if layer_of(m) is None)
    assert not missing, f"add these modules to LAYERS in {__file__}: {missing}"


def test_compatibility_forwards_only_in_module_getattr(graph):
    for a, b in sorted(COMPAT_FORWARDS):
        assert graph.has_edge(a, b), f"forward gone, remove from COMPAT_FORWARDS: {(a, b)}"
        assert graph.edges[a, b]["forward"], f"{a} imports {b} outside its __getattr__"


def test_no_import_points_up_a_layer(graph):
    up = upward_edges(graph) - COMPAT_FORWARDS
    new = sorted(up - ALLOWED_UPWARD)
    names = [n for n, _ in LAYERS]
    assert not new, "imports pointing up a layer:\n" + "\n".join(
        f"  {a} ({names[layer_of(a)]}, line {graph.edges[a, b]['line']}) -> {b} ({names[layer_of(b)]})"
        for a, b in new)
    fixed = sorted(ALLOWED_UPWARD - up)
    assert not fixed, f"fixed, remove from ALLOWED_UPWARD: {fixed}"


def test_no_import_cycle(graph):
    allowed = ALLOWED_UPWARD | ALLOWED_CYCLE | COMPAT_FORWARDS
    # the allowed imports are what closes today's cycles: without them, none may remain
    rest = graph.copy()
    rest.remove_edges_from(allowed)
    with pytest.raises(nx.NetworkXNoCycle):
        nx.find_cycle(rest)
    # and every cycle of the whole graph runs through an allowed import
    for cycle in nx.simple_cycles(graph):
        steps = set(zip(cycle, cycle[1:] + cycle[:1]))
        assert steps & allowed, f"import cycle {cycle}"
    stale = sorted(e for e in ALLOWED_CYCLE
                   if not graph.has_edge(*e) or not nx.has_path(graph, e[1], e[0]))
    assert not stale, f"no longer closing a cycle, remove from ALLOWED_CYCLE: {stale}"


def test_figures_printed(graph, capsys):
    f = figures(graph)
    with capsys.disabled():
        print("\nimport graph of tracechain:", ", ".join(f"{k} {v}" for k, v in f.items()))
    assert f["modules"] == len(package_modules(REPO, PACKAGE))


# -- the graph reader, on a small package written here ------------------------------------
def _bytecode_imports(code: types.CodeType) -> set[tuple[int, str, tuple[str, ...]]]:
    """The imports the standard library's modulefinder sees in ``code`` and the functions in it."""
    finder = modulefinder.ModuleFinder()
    out = set()
    todo = [code]
    while todo:
        co = todo.pop()
        for op, args in finder.scan_opcodes(co):
            if op == "absolute_import":
                fromlist, name = args
                out.add((0, name, tuple(fromlist or ())))
            elif op == "relative_import":
                level, fromlist, name = args
                out.add((level, name, tuple(fromlist or ())))
        todo.extend(c for c in co.co_consts if isinstance(c, types.CodeType))
    return out


def test_ast_reading_agrees_with_modulefinder():
    for mod, (path, _) in package_modules(REPO, PACKAGE).items():
        text = path.read_text(encoding="utf-8")
        seen = {(lv, name, names) for lv, name, names, _ in _import_statements(ast.parse(text))}
        assert seen == _bytecode_imports(compile(text, str(path), "exec")), mod


def _write(root: Path, files: dict[str, str]) -> None:
    for rel, text in files.items():
        p = root / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text(text, encoding="utf-8")


def test_reader_and_checks_on_a_toy_package(tmp_path):
    # expected edges written by hand from the import statements below
    _write(tmp_path, {
        "toy/__init__.py": "from .low import x\n",
        "toy/low.py": "import os\nx = 1\ndef __getattr__(name):\n    from .high import m\n    return m\n",
        "toy/mid/__init__.py": "",
        "toy/mid/a.py": "from ..low import x\nfrom . import b\n",
        "toy/mid/b.py": "def f():\n    from toy.high import g\n",  # function-level, upward
        "toy/high.py": "import toy.mid.a\nimport importlib\nm = importlib.import_module('toy.low')\n",
    })
    g = import_graph(tmp_path, "toy")
    assert set(g.edges) == {
        ("toy", "toy.low"), ("toy.mid.a", "toy.low"), ("toy.mid.a", "toy.mid.b"),
        ("toy.mid.b", "toy.high"), ("toy.high", "toy.mid.a"), ("toy.high", "toy.low"), ("toy.low", "toy.high"),
    }
    assert [e for e in g.edges if g.edges[e]["forward"]] == [("toy.low", "toy.high")]
    rank = {"toy": 0, "toy.low": 0, "toy.mid": 1, "toy.mid.a": 1, "toy.mid.b": 1, "toy.high": 2}
    assert upward_edges(g, rank.get) == {("toy.mid.b", "toy.high"), ("toy.low", "toy.high")}
    g.remove_edge("toy.low", "toy.high")
    assert sorted(nx.find_cycle(g)) == sorted([("toy.mid.a", "toy.mid.b"), ("toy.mid.b", "toy.high"),
                                               ("toy.high", "toy.mid.a")])
    assert figures(g, rank.get) == {"modules": 6, "arrows": 6, "upward": 1, "upward_forwards_only": 0,
                                 "circles": 1, "simple_cycles": 1}
