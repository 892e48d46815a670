"""The package's import graph: no import circles, and the numerical core never imports the tool wing.

Read from the source with ``ast`` (every ``import`` statement, at module level
or inside a function), so a circle that only closes inside a function, which
Python tolerates until the day the order changes, is caught too.
"""

import ast
import pathlib

import kalmax

PACKAGE = pathlib.Path(kalmax.__file__).parent


def _module_name(path: pathlib.Path) -> str:
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _imports(path: pathlib.Path, modules: set) -> set:
    """The kalmax modules that ``path`` imports (``from .x import y`` counts as x, or x.y when y is a module)."""
    name = _module_name(path)
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    found = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            targets = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                root = ".".join(base + ([node.module] if node.module else []))
            else:
                root = node.module or ""
            targets = [f"{root}.{a.name}" if f"{root}.{a.name}" in modules else root for a in node.names]
        else:
            continue
        for t in targets:
            while t and t not in modules:  # `import kalmax._src.x.y` names x.y; keep the longest known module
                t = t.rpartition(".")[0]
            if t and t != name:
                found.add(t)
    return found


def _graph():
    files = [p for p in PACKAGE.rglob("*.py")]
    modules = {_module_name(p) for p in files}
    return {_module_name(p): _imports(p, modules) for p in files}


def _is_package_init(mod: str) -> bool:
    return (PACKAGE.parent / mod.replace(".", "/") / "__init__.py").exists()


def test_the_graph_reader_sees_known_edges():
    # The reader itself must work, or the tests below pass vacuously.
    g = _graph()
    assert "kalmax._src.tools.spec" in g["kalmax._src.tools.model_file"]
    assert "kalmax._src.continuous" in g["kalmax._src.tools.spec"]
    assert "kalmax._src.backends.registry" in g["kalmax._src.backends"]
    assert len(g) > 40


def test_no_import_circles():
    # A package's __init__ importing its children is how re-exports work; a child
    # importing the package's __init__ back is not needed anywhere, so every
    # edge counts.
    g = _graph()
    state, stack, circles = {}, [], []

    def visit(m):
        state[m] = "open"
        stack.append(m)
        for n in sorted(g.get(m, ())):
            if _is_package_init(n) and m.startswith(n + "."):
                continue  # `from . import x` inside package n loads n first: not a circle of ours
            if state.get(n) == "open":
                circles.append(stack[stack.index(n):] + [n])
            elif n not in state:
                visit(n)
        stack.pop()
        state[m] = "done"

    for m in sorted(g):
        if m not in state:
            visit(m)
    assert not circles, "import circles: " + "; ".join(" -> ".join(c) for c in circles)


def test_numerical_core_does_not_import_the_tool_wing():
    g = _graph()
    core = [m for m in g if m.startswith("kalmax._src.") and not m.startswith("kalmax._src.tools")]
    bad = {m: sorted(n for n in g[m] if n.startswith("kalmax._src.tools") or n == "kalmax.cli") for m in core}
    assert not {m: v for m, v in bad.items() if v}
