"""The house has floors: no module of the toolkit imports one that imports it back, directly or
round a circle, and no package imports a package that imports it back.

Every import counts, at the top of a module or inside a function: a function-level import only
hides a circle, it does not break one. Read from the source with ``ast``, so nothing is imported.
"""

from __future__ import annotations

import ast
from pathlib import Path

TOOLKIT = Path(__file__).resolve().parent.parent / "toolkit"


def module_name(path: Path) -> str:
    parts = path.relative_to(TOOLKIT.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def imports() -> dict[str, set[str]]:
    """Each toolkit module and the toolkit modules it imports."""
    modules = {module_name(p): p for p in TOOLKIT.rglob("*.py")}
    found: dict[str, set[str]] = {name: set() for name in modules}
    for name, path in modules.items():
        package = name if path.name == "__init__.py" else name.rpartition(".")[0]
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            targets: list[str] = []
            if isinstance(node, ast.Import):
                targets = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom):
                base = node.module or ""
                if node.level:
                    anchor = package.split(".")[: len(package.split(".")) - node.level + 1]
                    base = ".".join([*anchor, base] if base else anchor)
                targets = [base] + [f"{base}.{alias.name}" for alias in node.names]
            for target in targets:
                if target in modules and target != name:
                    found[name].add(target)
    return found


def circles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one member (Tarjan)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    out: list[list[str]] = []

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
                out.append(sorted(component))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return out


def test_no_module_imports_one_that_imports_it_back() -> None:
    found = circles(imports())
    assert found == [], f"import circles: {found}"


def test_no_package_imports_one_that_imports_it_back() -> None:
    packages: dict[str, set[str]] = {}
    for name, targets in imports().items():
        mine = name.split(".")[1] if name.count(".") else "toolkit"
        for target in targets:
            theirs = target.split(".")[1] if target.count(".") else "toolkit"
            if theirs != mine:
                packages.setdefault(mine, set()).add(theirs)
    # the package's own face (toolkit/__init__.py) holds only the version, which the outputs read
    packages.pop("toolkit", None)
    for targets in packages.values():
        targets.discard("toolkit")
    assert circles(packages) == [], f"package circles: {circles(packages)}"


def test_the_circle_finder_finds_a_circle() -> None:
    assert circles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]
