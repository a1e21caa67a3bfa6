"""The store package has no import cycles: every import between its modules, also those inside
functions and under TYPE_CHECKING, points one way."""

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "panel" / "store"


def _imports(path: Path) -> set[str]:
    """Modules of panel.store that ``path`` imports anywhere in its body."""
    found = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("panel.store"):
            found.add(node.module)
            found.update(f"{node.module}.{a.name}" for a in node.names)
        elif isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name.startswith("panel.store"))
    return found


def _graph() -> dict[str, set[str]]:
    modules = {f"panel.store.{p.stem}": p for p in PACKAGE.glob("*.py") if p.stem != "__init__"}
    return {name: {m for m in _imports(path) if m in modules and m != name} for name, path in modules.items()}


def _cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One import cycle as a path of module names, or None (depth-first search)."""
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(name: str) -> list[str] | None:
        state[name] = 1
        stack.append(name)
        for target in sorted(graph[name]):
            if state.get(target) == 1:
                return stack[stack.index(target):] + [target]
            if target not in state and (found := visit(target)):
                return found
        stack.pop()
        state[name] = 2
        return None

    for name in sorted(graph):
        if name not in state and (found := visit(name)):
            return found
    return None


def test_the_cycle_finder_sees_a_cycle():
    assert _cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert _cycle({"a": {"b"}, "b": set()}) is None


def test_no_module_of_the_store_imports_one_that_imports_it_back():
    graph = _graph()
    assert "panel.store.connection" not in graph["panel.store.migrate"]
    assert _cycle(graph) is None, " -> ".join(_cycle(graph))
