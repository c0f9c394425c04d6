"""The import graph of the dbfit package (imports inside functions counted, ``if TYPE_CHECKING:`` ones not),
its cycles, and the imports that go up the layers.

    python tests/import_layers.py        # from the repository root; exits 1 on a cycle or an upward import

The layers, lowest first, are ``LAYERS``; a module may import its own package and the packages below it.
"""

from __future__ import annotations

import ast
import sys
from pathlib import Path

PACKAGE = "dbfit"
LAYERS = (
    "errors",
    "expressions",
    "solver",
    "engines",
    "design",
    "model",
    "fitting",
    "store",
    "deployment",
    "assessment",
    "lifecycle",
    "interfaces",
)


def module_name(path: Path, root: Path) -> str:
    parts = list(path.relative_to(root).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def imports_of(path: Path, name: str, modules: set[str]) -> set[str]:
    """Every dbfit module ``path`` imports, at any depth of the file (functions included)."""
    tree = ast.parse(path.read_text(), filename=str(path))
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    found: set[str] = set()
    typing_only = {
        id(sub)
        for node in ast.walk(tree)
        if isinstance(node, ast.If) and _is_type_checking(node.test)
        for stmt in node.body
        for sub in ast.walk(stmt)
    }
    for node in ast.walk(tree):
        if id(node) in typing_only:
            continue
        if isinstance(node, ast.Import):
            targets = [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")
                anchor = anchor[: len(anchor) - node.level + 1]
                base = ".".join([*anchor, base] if base else anchor)
            targets = [
                f"{base}.{alias.name}" if f"{base}.{alias.name}" in modules else base for alias in node.names
            ]
        else:
            continue
        for target in targets:
            while target and target not in modules:
                target = target.rpartition(".")[0]
            if target and target != name:
                found.add(target)
    return found


def _is_type_checking(test: ast.expr) -> bool:
    """``if TYPE_CHECKING:`` guards imports for annotations only; they never run."""
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"
    )


def graph(root: Path) -> dict[str, set[str]]:
    files = {module_name(p, root): p for p in sorted((root / PACKAGE).rglob("*.py"))}
    modules = set(files)
    edges = {name: imports_of(path, name, modules) for name, path in files.items()}
    # importing a module runs its parent packages first; that is not counted as depending on them
    return {name: {t for t in targets if not name.startswith(t + ".")} for name, targets in edges.items()}


def cycles(edges: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components of more than one module (Tarjan 1972, SIAM J. Comput. 1(2) 146-160)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []

    def visit(node: str) -> None:
        index[node] = low[node] = len(index)
        stack.append(node)
        on_stack.add(node)
        for target in sorted(edges.get(node, ())):
            if target not in index:
                visit(target)
                low[node] = min(low[node], low[target])
            elif target in on_stack:
                low[node] = min(low[node], index[target])
        if low[node] == index[node]:
            component = []
            while True:
                member = stack.pop()
                on_stack.discard(member)
                component.append(member)
                if member == node:
                    break
            if len(component) > 1:
                found.append(sorted(component))

    sys.setrecursionlimit(10_000)
    for node in sorted(edges):
        if node not in index:
            visit(node)
    return found


def layer(module: str) -> int:
    """The layer of a dbfit module; the top-level package and ``__main__`` sit above every layer."""
    parts = module.split(".")
    return LAYERS.index(parts[1]) if len(parts) > 1 and parts[1] in LAYERS else len(LAYERS)


def upward_imports(edges: dict[str, set[str]]) -> list[tuple[str, str]]:
    """Every import of a module from a higher layer than its own."""
    return [
        (source, target)
        for source in sorted(edges)
        for target in sorted(edges[source])
        if layer(target) > layer(source)
    ]


if __name__ == "__main__":
    root = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(".")
    edges = graph(root)
    found = cycles(edges)
    for component in found:
        print("cycle:", " <-> ".join(component))
    upward = upward_imports(edges)
    for source, target in upward:
        print(f"upward: {source} imports {target}")
    print(f"{len(found)} import cycle(s), {len(upward)} upward import(s)")
    sys.exit(1 if found or upward else 0)
