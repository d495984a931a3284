"""The layout of the package: no import cycle between onnxcal's modules, no module too long to read.

The graph is read from the source (``ast``), not from ``sys.modules``, so it holds
every import a module makes, at its top or inside a function. An import of
``onnxcal.a.b`` runs ``onnxcal/a/__init__.py`` first, so it counts as an import
of ``onnxcal.a`` too (except from inside ``onnxcal.a``, which is being imported
already). Left out: imports under ``if TYPE_CHECKING:`` (never run), and the root
package ``onnxcal/__init__.py``, which imports ``api`` (and so every stage) only
after it has set ``__version__``, the one name modules import from it (DEVELOPERS.md,
"The Python API and the module names").
"""

from __future__ import annotations

import ast
from pathlib import Path

import onnxcal

PACKAGE = Path(onnxcal.__file__).resolve().parent
ROOT = "onnxcal"
MAX_LINES = 650  # HOUSE_RULES: "about 600 lines at most"

# Modules over MAX_LINES that are allowed to stay so for now: none. A module may only
# leave this set; a new one is split by concern before it grows past the limit.
KNOWN_LARGE: set[str] = set()


def module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def modules() -> dict[str, Path]:
    return {module_name(p): p for p in sorted(PACKAGE.rglob("*.py"))}


def _type_checking(node: ast.If) -> bool:
    test = node.test
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"
    )


def _imports(tree: ast.AST):
    """Every Import / ImportFrom node, leaving out ``if TYPE_CHECKING:`` blocks."""
    stack = [tree]
    while stack:
        node = stack.pop()
        if isinstance(node, ast.If) and _type_checking(node):
            stack.extend(node.orelse)
            continue
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            yield node
        stack.extend(ast.iter_child_nodes(node))


def _resolve(name: str, node: ast.ImportFrom) -> str:
    """The absolute module an ImportFrom in module ``name`` reads from."""
    if not node.level:
        return node.module or ""
    package = name.split(".") if is_package(name) else name.split(".")[:-1]
    base = package[: len(package) - node.level + 1]
    return ".".join(base + ([node.module] if node.module else []))


_ALL = modules()


def is_package(name: str) -> bool:
    return _ALL.get(name, Path()).name == "__init__.py"


def _with_parents(target: str, importer: str) -> set[str]:
    """``target`` and the packages an import of it runs first, but not the importer's own."""
    own = {".".join(importer.split(".")[:i]) for i in range(1, importer.count(".") + 2)}
    parts = target.split(".")
    found = {".".join(parts[:i]) for i in range(2, len(parts) + 1)}
    return {m for m in found if m in _ALL and (m == target or m not in own)}


def import_graph() -> dict[str, set[str]]:
    """Module -> the onnxcal modules it imports (the root package left out, see the docstring)."""
    graph: dict[str, set[str]] = {}
    for name, path in _ALL.items():
        if name == ROOT:
            continue
        edges: set[str] = set()
        for node in _imports(ast.parse(path.read_text(), str(path))):
            if isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            else:
                source = _resolve(name, node)
                # ``from pkg import sub`` imports the submodule; ``from pkg import name`` the package
                targets = [f"{source}.{a.name}" if f"{source}.{a.name}" in _ALL else source for a in node.names]
            for target in targets:
                if target.split(".")[0] == ROOT:
                    edges |= _with_parents(target, name)
        edges.discard(ROOT)
        edges.discard(name)
        graph[name] = edges
    return graph


def cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """The strongly connected components of more than one module (Tarjan), each sorted."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(graph.get(v, ())):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                component.append(w)
                if w == v:
                    break
            if len(component) > 1:
                found.append(sorted(component))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return found


def test_the_graph_reader_sees_cycles_and_packages():
    # the checks below must be able to fail: a known cycle, and a package entered through a submodule
    assert cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]
    assert cycles({"a": {"b"}, "b": set()}) == []
    graph = import_graph()
    # ``from . import nested`` in graph/find.py: the submodule, not the package
    assert "onnxcal.graph.nested" in graph["onnxcal.graph.find"]
    assert graph["onnxcal.maps.matrix"] >= {"onnxcal.maps._linear", "onnxcal.maps._base"}
    assert "onnxcal.maps" not in graph["onnxcal.maps.matrix"]  # its own package is being imported already
    assert "onnxcal" not in graph and not any("onnxcal" in edges for edges in graph.values())
    # an import of a submodule runs its package first, unless the importer is inside that package
    assert _with_parents("onnxcal.graph.external", "onnxcal.verify") == {"onnxcal.graph", "onnxcal.graph.external"}
    assert _with_parents("onnxcal.graph.tensors", "onnxcal.graph.find") == {"onnxcal.graph.tensors"}


def test_no_import_cycle_between_onnxcals_modules():
    assert cycles(import_graph()) == []


def test_no_module_over_the_line_limit():
    long = {
        str(path.relative_to(PACKAGE.parent)): n
        for path in _ALL.values()
        if (n := len(path.read_text().splitlines())) > MAX_LINES
    }
    assert {p: n for p, n in long.items() if p not in KNOWN_LARGE} == {}


def test_the_known_large_modules_are_still_there_and_large():
    # an entry leaves KNOWN_LARGE as soon as its module is split (or gone), so the list cannot
    # come to excuse a module that grows later
    stale = sorted(
        p for p in KNOWN_LARGE
        if not (PACKAGE.parent / p).is_file() or len((PACKAGE.parent / p).read_text().splitlines()) <= MAX_LINES
    )
    assert stale == [], "split or gone: remove these from KNOWN_LARGE"
