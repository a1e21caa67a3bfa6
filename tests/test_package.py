import panel


def test_version_matches_distribution():
    from importlib.metadata import version

    assert panel.__version__ == version("riskprem")


def test_no_import_cycles_in_the_package():
    # Every import of a panel module by another, lazy ones inside functions included: the module
    # graph must have no cycle (strongly connected component of more than one module).
    import ast
    from pathlib import Path

    root = Path(panel.__file__).parent
    modules = {}
    for path in root.rglob("*.py"):
        parts = list(path.relative_to(root.parent).with_suffix("").parts)
        modules[".".join(parts[:-1] if parts[-1] == "__init__" else parts)] = path
    graph = {name: set() for name in modules}
    for name, path in modules.items():
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                graph[name] |= {a.name for a in node.names if a.name in modules}
            elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                for alias in node.names:   # "from pkg import submodule" imports the submodule
                    sub = f"{node.module}.{alias.name}"
                    graph[name].add(sub if sub in modules else node.module)
        graph[name] = {t for t in graph[name] if t in modules and t != name}
    cycles = []
    for start in graph:                    # any module that reaches itself
        seen, todo = set(), list(graph[start])
        while todo:
            mod = todo.pop()
            if mod == start:
                cycles.append(start)
                break
            if mod not in seen:
                seen.add(mod)
                todo.extend(graph[mod])
    assert cycles == []
