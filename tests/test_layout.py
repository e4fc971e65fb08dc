"""The package's import structure, read from its source with ``ast``: no
import cycles anywhere (imports inside functions count; ``if TYPE_CHECKING:``
blocks do not), and the core (operators, intervals, filters, certificates)
never imports the trainer, the command line, the demo or an optional extra,
directly or through another module of the package (the house rules in
DEVELOPERS.md)."""

from __future__ import annotations

import ast
import pathlib

import pytest

PACKAGE = "stablefilt"
ROOT = pathlib.Path(__file__).resolve().parent.parent / PACKAGE

CORE = ("_joint", "_inputworst", "_balance", "_compose", "_graph", "_interval", "_filters", "_exact", "_series", "_kernel", "_filterbounds", "_certify", "_modelcert")
NOT_IN_CORE = ("_train", "cli", "demo")
EXTRAS = ("matplotlib", "tqdm", "rich", "dask", "distributed", "pymetis", "equinox", "flax", "hypothesis")


def _is_type_checking(test: ast.expr) -> bool:
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING")


def _imports(tree: ast.AST, module: str, modules: set[str]) -> tuple[set[str], set[str]]:
    """``(package modules, outside top-level names)`` imported by ``module``
    (a dotted name such as ``stablefilt._graph``), at any depth except under
    ``if TYPE_CHECKING:``."""
    inside, outside = set(), set()
    package = module if module == PACKAGE else module.rsplit(".", 1)[0]

    def visit(node):
        if isinstance(node, ast.If) and _is_type_checking(node.test):
            for child in node.orelse:
                visit(child)
            return
        if isinstance(node, ast.Import):
            for alias in node.names:
                name = alias.name
                if name == PACKAGE or name.startswith(PACKAGE + "."):
                    inside.add(name)
                else:
                    outside.add(name.split(".")[0])
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[:len(base) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            if target == PACKAGE or target.startswith(PACKAGE + "."):
                # ``from . import _x`` names a module; ``from ._x import y`` a name in one.
                for alias in node.names:
                    sub = f"{target}.{alias.name}"
                    inside.add(sub if sub in modules else target)
            else:
                outside.add(target.split(".")[0])
        for child in ast.iter_child_nodes(node):
            visit(child)

    visit(tree)
    if module == PACKAGE:
        inside |= {f"{PACKAGE}.{m}" for m in _lazy_table(tree).values()}
    inside.discard(module)
    return inside, outside


def _lazy_table(tree: ast.AST) -> dict[str, str]:
    """The package's ``_PUBLIC = {name: module}``: names its ``__getattr__``
    loads from those modules on first use, imports in effect."""
    for node in getattr(tree, "body", []):
        if (isinstance(node, (ast.Assign, ast.AnnAssign)) and isinstance(node.value, ast.Dict)
                and any(isinstance(t, ast.Name) and t.id == "_PUBLIC"
                        for t in (node.targets if isinstance(node, ast.Assign) else [node.target]))):
            return {k.value: v.value for k, v in zip(node.value.keys, node.value.values)
                    if isinstance(k, ast.Constant) and isinstance(v, ast.Constant)}
    return {}


def import_graph(sources: dict[str, str]) -> tuple[dict[str, set[str]], dict[str, set[str]]]:
    """From ``{dotted module name: source}``, the package import graph and the
    outside packages each module imports."""
    modules = set(sources)
    graph, extern = {}, {}
    for name, text in sources.items():
        graph[name], extern[name] = _imports(ast.parse(text), name, modules)
    return graph, extern


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """A cycle ``[a, b, ..., a]`` of ``graph``, or None (depth-first search)."""
    state, stack = {}, []

    def dfs(node):
        state[node] = "open"
        stack.append(node)
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == "open":
                return stack[stack.index(nxt):] + [nxt]
            if nxt not in state:
                found = dfs(nxt)
                if found:
                    return found
        stack.pop()
        state[node] = "done"
        return None

    for node in sorted(graph):
        if node not in state:
            found = dfs(node)
            if found:
                return found
    return None


def reachable(graph: dict[str, set[str]], start: str) -> set[str]:
    seen, todo = set(), [start]
    while todo:
        for nxt in graph.get(todo.pop(), ()):
            if nxt not in seen:
                seen.add(nxt)
                todo.append(nxt)
    return seen


def _package_sources() -> dict[str, str]:
    out = {}
    for path in sorted(ROOT.glob("*.py")):
        name = PACKAGE if path.stem == "__init__" else f"{PACKAGE}.{path.stem}"
        out[name] = path.read_text(encoding="utf-8")
    return out


SOURCES = _package_sources()
GRAPH, EXTERN = import_graph(SOURCES)


def test_the_package_was_read():
    assert len(SOURCES) > 20
    assert f"{PACKAGE}._certify" in GRAPH[PACKAGE]  # __init__ re-exports it (loaded on first use)


def test_no_import_cycles():
    assert find_cycle(GRAPH) is None, " -> ".join(find_cycle(GRAPH))


@pytest.mark.parametrize("core", CORE)
def test_core_modules_stay_core(core):
    name = f"{PACKAGE}.{core}"
    assert name in GRAPH, f"core module {core} is missing"
    reached = reachable(GRAPH, name) | {name}
    bad = sorted(f"{PACKAGE}.{m}" for m in NOT_IN_CORE if f"{PACKAGE}.{m}" in reached)
    assert not bad, f"{core} imports {bad}"
    extras = sorted(set().union(*(EXTERN[m] for m in reached)) & set(EXTRAS))
    assert not extras, f"{core} imports optional extras {extras}"


#: The one module allowed to import matplotlib (the ``report`` extra), lazily.
PLOTTING = f"{PACKAGE}._figures"


def test_only_the_figure_module_imports_matplotlib():
    assert PLOTTING in EXTERN and "matplotlib" in EXTERN[PLOTTING]
    others = sorted(m for m, names in EXTERN.items() if "matplotlib" in names and m != PLOTTING)
    assert not others, f"{others} import matplotlib; only {PLOTTING} may"


def test_figure_module_imports_matplotlib_only_inside_functions():
    """Importing the package (or the figure module) never imports matplotlib:
    the import sits in a function, not at module level."""
    tree = ast.parse(SOURCES[PLOTTING])
    top = [n for n in tree.body if isinstance(n, (ast.Import, ast.ImportFrom))]
    names = {a.name.split(".")[0] for n in top if isinstance(n, ast.Import) for a in n.names}
    names |= {(n.module or "").split(".")[0] for n in top if isinstance(n, ast.ImportFrom)}
    assert "matplotlib" not in names


# ---------------------------------------------------------------------------
# The checks themselves, on small synthetic packages (common practice: a
# checker must be seen to fail).


def test_find_cycle_on_synthetic_graphs():
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert find_cycle({"a": {"a"}}) == ["a", "a"]
    assert find_cycle({"a": {"b", "c"}, "b": {"c"}, "c": set()}) is None


def test_parser_sees_function_imports_and_skips_type_checking():
    sources = {
        f"{PACKAGE}": "from ._a import f\n",
        f"{PACKAGE}._a": "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    from ._b import B\n"
                         "def f():\n    from ._b import g\n    import tqdm\n    return g\n",
        f"{PACKAGE}._b": "from . import _a\nimport numpy as np\n",
        f"{PACKAGE}._c": "import stablefilt._b\nfrom stablefilt import _a\n",
    }
    graph, extern = import_graph(sources)
    assert graph[f"{PACKAGE}._a"] == {f"{PACKAGE}._b"}  # the function's import, not the TYPE_CHECKING one
    assert graph[f"{PACKAGE}._b"] == {f"{PACKAGE}._a"}
    assert graph[f"{PACKAGE}._c"] == {f"{PACKAGE}._a", f"{PACKAGE}._b"}
    assert extern[f"{PACKAGE}._a"] == {"typing", "tqdm"}
    assert find_cycle(graph) == [f"{PACKAGE}._a", f"{PACKAGE}._b", f"{PACKAGE}._a"]
    # Without the function-level import the cycle is gone; under TYPE_CHECKING it never counted.
    sources[f"{PACKAGE}._a"] = "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    from ._b import B\n"
    assert find_cycle(import_graph(sources)[0]) is None


def test_the_lazy_table_counts_as_imports():
    sources = {
        f"{PACKAGE}": '_PUBLIC = {\n    "f": "_a",\n}\n',
        f"{PACKAGE}._a": "import stablefilt\n",
    }
    graph, _ = import_graph(sources)
    assert graph[PACKAGE] == {f"{PACKAGE}._a"}
    assert find_cycle(graph) == [PACKAGE, f"{PACKAGE}._a", PACKAGE]
