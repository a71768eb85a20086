"""The package's shape: no import circle (lazy imports count), no module importing another module's
private names, no module over the size limit. Read statically from src/ with `ast`."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

SRC = Path(__file__).resolve().parents[1] / "src" / "patchloom"
MAX_LINES = 700


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(SRC.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


MODULES = {_module_name(p): p for p in sorted(SRC.rglob("*.py"))}


def _resolve(module: str, is_package: bool, level: int, target: str | None) -> str:
    """The absolute name of a relative import `from {'.' * level}{target} import ...`."""
    base = module.split(".")
    if not is_package:
        base = base[:-1]
    if level > 1:
        base = base[: len(base) - (level - 1)]
    return ".".join(base + ([target] if target else []))


def _imports(module: str) -> list[tuple[str, str | None, int]]:
    """(imported module, imported name or None, line) for every import of ours in `module`,
    including those inside functions (lazy imports count)."""
    path = MODULES[module]
    tree = ast.parse(path.read_text(encoding="utf-8"))
    is_package = path.name == "__init__.py"
    out: list[tuple[str, str | None, int]] = []
    # Imports under `if TYPE_CHECKING:` never run, so they make no circle.
    typing_only = {id(n) for block in ast.walk(tree) if isinstance(block, ast.If)
                   and getattr(block.test, "id", getattr(block.test, "attr", None)) == "TYPE_CHECKING"
                   for stmt in block.body for n in ast.walk(stmt)}
    for node in ast.walk(tree):
        if id(node) in typing_only:
            continue
        if isinstance(node, ast.ImportFrom):
            if node.level:
                target = _resolve(module, is_package, node.level, node.module)
            elif node.module and node.module.split(".")[0] == "patchloom":
                target = node.module
            else:
                continue
            for alias in node.names:
                sub = f"{target}.{alias.name}"
                if sub in MODULES:  # `from . import engine_ray` imports a module
                    out.append((sub, None, node.lineno))
                else:
                    out.append((target, alias.name, node.lineno))
        elif isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.split(".")[0] == "patchloom":
                    out.append((alias.name, None, node.lineno))
    return out


def _graph() -> dict[str, set[str]]:
    graph: dict[str, set[str]] = {m: set() for m in MODULES}
    for module in MODULES:
        for target, _, _ in _imports(module):
            # Importing a.b.c runs a and a.b first; the package root only names the public API.
            if target in MODULES and target != module and target != "patchloom":
                graph[module].add(target)
    return graph


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Every strongly connected component with more than one module (Tarjan)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []
    counter = [0]

    def visit(v: str) -> None:
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on_stack.add(v)
        for w in sorted(graph[v]):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                found.append(sorted(comp))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return found


def test_no_import_circle():
    assert _cycles(_graph()) == []


def test_cycle_finder_finds_a_planted_circle():
    graph = {"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}
    assert _cycles(graph) == [["a", "b", "c"]]


def test_no_private_import_across_modules():
    bad = []
    for module in MODULES:
        for target, name, line in _imports(module):
            if name and name.startswith("_") and not name.startswith("__") and target != module:
                bad.append(f"{MODULES[module].relative_to(SRC.parent)}:{line} imports {target}.{name}")
    assert bad == []


def test_no_private_attribute_of_another_module():
    """`from . import store; store._bar(...)` is a private import too."""
    bad = []
    for module, path in MODULES.items():
        tree = ast.parse(path.read_text(encoding="utf-8"))
        imported = {alias.asname or alias.name for node in ast.walk(tree) if isinstance(node, ast.ImportFrom)
                    for alias in node.names
                    if f"{_resolve(module, path.name == '__init__.py', node.level, node.module)}.{alias.name}" in MODULES}
        for node in ast.walk(tree):
            if (isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name) and node.value.id in imported
                    and node.attr.startswith("_") and not node.attr.startswith("__")):
                bad.append(f"{path.relative_to(SRC.parent)}:{node.lineno} uses {node.value.id}.{node.attr}")
    assert bad == []


@pytest.mark.parametrize("module", sorted(MODULES))
def test_module_size(module):
    lines = MODULES[module].read_text(encoding="utf-8").count("\n")
    assert lines <= MAX_LINES, f"{module} has {lines} lines; split it by concern (limit {MAX_LINES})"
