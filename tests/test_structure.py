"""The package's shape: no import cycle, not even through imports inside functions.

Common practice (a layered architecture; DESIGN.md "one module per stage").
"""

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "discover"
MODULES = sorted(p.stem for p in PACKAGE.glob("*.py") if p.stem not in ("__init__", "__main__"))


def imports_of(path):
    """discover modules a module imports, at top level or inside functions."""
    found = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.ImportFrom) and node.level == 1:
            if node.module:
                found.add(node.module.split(".")[0])
            else:
                found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and (node.module or "").startswith("discover."):
            found.add(node.module.split(".")[1])
    return found & set(MODULES)


def test_import_graph_has_no_cycle():
    graph = {name: imports_of(PACKAGE / f"{name}.py") for name in MODULES}
    state = {}

    def visit(node, path):
        state[node] = "open"
        for nxt in graph[node]:
            if state.get(nxt) == "open":
                raise AssertionError("import cycle: " + " -> ".join(path + [node, nxt]))
            if nxt not in state:
                visit(nxt, path + [node])
        state[node] = "done"

    for name in MODULES:
        if name not in state:
            visit(name, [])
