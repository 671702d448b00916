"""The package's layers import only downward, and no modules import each other in a circle.

The import graph is read from the source with :mod:`ast` (every ``import`` and ``from ...
import``, at module level or inside a function: a lazy import is still a dependency; imports
under ``if TYPE_CHECKING:`` serve type hints only and are left out). Each
module belongs to the layer of its longest matching prefix in ``LAYERS``; an import from a
lower layer into a higher one, or an import circle among modules, fails the test with the
offending edges named. DEVELOPERS.md draws the same map.
"""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[2] / "plugin" / "chainyard"

# lowest first; a module may import its own layer (no circles) and any layer below it
LAYERS: tuple[tuple[str, ...], ...] = (
    (
        "chainyard.errors",
        "chainyard.argtypes",  # argparse types shared by the command parsers
        "chainyard.limits",
        "chainyard.testhooks",
        "chainyard.facts",
        "chainyard.display",  # number formatting shared by tables and reports
        "chainyard.workflow.imports",  # emcee without its KDE-only import (nothing of ours)
    ),
    ("chainyard.streams", "chainyard.progress"),
    ("chainyard.diagnostics",),
    ("chainyard.decisions",),
    ("chainyard.config",),
    ("chainyard.datafiles", "chainyard.evaluator"),
    # the workflow config (and its run families) reads model paths
    ("chainyard.model", "chainyard.workflow.config", "chainyard.workflow.families"),
    ("chainyard.store",),
    ("chainyard.engine",),
    ("chainyard.provenance",),
    ("chainyard.analysis",),
    ("chainyard.report",),
    ("chainyard.status",),
    ("chainyard.commands", "chainyard.cli"),
    ("chainyard.workflow",),
    ("chainyard",),  # the public API at the package root (imports lazily from every layer)
)

# edges still waiting for their move (each is removed from here when its code moves)
PENDING_UPWARD: frozenset[tuple[str, str]] = frozenset()
PENDING_CIRCLES: frozenset[tuple[str, ...]] = frozenset()


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _modules() -> dict[str, Path]:
    return {_module_name(p): p for p in PACKAGE.rglob("*.py")}


def _runtime_nodes(tree: ast.AST) -> list[ast.AST]:
    """Every node except those under ``if TYPE_CHECKING:`` (imports for type hints only)."""
    out: list[ast.AST] = []
    todo = [tree]
    while todo:
        node = todo.pop()
        out.append(node)
        if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test):
            todo.extend(node.orelse)
            continue
        todo.extend(ast.iter_child_nodes(node))
    return out


def _imports(name: str, path: Path, known: set[str]) -> set[str]:
    """Chainyard modules that ``name`` imports (a ``from pkg import sub`` names ``pkg.sub``)."""
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    found: set[str] = set()
    for node in _runtime_nodes(ast.parse(path.read_text(), filename=str(path))):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - node.level + 1]
                source = ".".join(base + ([node.module] if node.module else []))
            else:
                source = node.module or ""
            subs = [f"{source}.{a.name}" for a in node.names if f"{source}.{a.name}" in known]
            if subs and len(subs) == len(node.names):
                found.update(subs)  # only submodules: the package's __init__ is not the point
            else:
                found.add(source)
                found.update(subs)
    return {m for m in found if m in known and m != name}


def _layer(name: str) -> int:
    best, floor = -1, -1
    for index, prefixes in enumerate(LAYERS):
        for prefix in prefixes:
            if (name == prefix or name.startswith(prefix + ".")) and len(prefix) > best:
                best, floor = len(prefix), index
    assert floor >= 0, f"{name} is in no layer: add it to LAYERS"
    return floor


def _graph() -> dict[str, set[str]]:
    modules = _modules()
    known = set(modules)
    return {name: _imports(name, path, known) for name, path in modules.items()}


def test_every_module_has_a_layer() -> None:
    for name in _modules():
        _layer(name)


def test_no_import_runs_upward() -> None:
    upward = sorted(
        f"{a} (layer {_layer(a)}) -> {b} (layer {_layer(b)})"
        for a, targets in _graph().items()
        for b in targets
        if _layer(b) > _layer(a) and (a, b) not in PENDING_UPWARD
    )
    assert not upward, "imports from a lower layer up to a higher one:\n" + "\n".join(upward)


def test_no_import_circles() -> None:
    graph = _graph()
    # Tarjan's strongly connected components (Tarjan 1972, SIAM J. Comput. 1(2):146-160)
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    circles: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(graph[v]):
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
            if len(component) > 1 and tuple(sorted(component)) not in PENDING_CIRCLES:
                circles.append(sorted(component))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    assert not circles, "import circles:\n" + "\n".join(" <-> ".join(c) for c in circles)


def test_the_checker_sees_a_planted_upward_import(tmp_path: Path) -> None:
    """The graph reader finds relative and lazy imports (a check that it checks something)."""
    pkg = tmp_path / "chainyard" / "store"
    pkg.mkdir(parents=True)
    (pkg / "__init__.py").write_text("")
    source = "def f():\n    from ..analysis import export\n    from . import layout\n"
    (pkg / "zarr_store.py").write_text(source)
    found = _imports(
        "chainyard.store.zarr_store",
        pkg / "zarr_store.py",
        {"chainyard.analysis.export", "chainyard.store.layout", "chainyard.analysis"},
    )
    assert found == {"chainyard.analysis.export", "chainyard.store.layout"}
    assert _layer("chainyard.analysis.export") > _layer("chainyard.store.zarr_store")
