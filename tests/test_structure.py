"""The package's own shape: no import circle among its modules, no function longer than 80 lines.

Both facts are read from the source with the standard library's `ast` (no import of the package), so a
circle hidden inside a function body counts as much as one at the top of a module.
"""
import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "attncompress"
MAX_BODY = 80  # lines of a function body, docstring excluded (the house style's limit)


def _module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _modules() -> dict[str, ast.Module]:
    return {_module_name(p): ast.parse(p.read_text(), str(p)) for p in sorted(PACKAGE.rglob("*.py"))}


def _resolve(current: str, is_package: bool, node: ast.ImportFrom) -> str:
    """The absolute module an ImportFrom names: ``from ..x import y`` in ``a.b.c`` → ``a.x``."""
    if node.level == 0:
        return node.module or ""
    base = current.split(".")
    base = base if is_package else base[:-1]
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def import_graph(modules: dict[str, ast.Module]) -> dict[str, set[str]]:
    """module → the package modules it imports, anywhere in its body (module level and inside functions).

    ``from .pkg import name`` counts as an import of ``pkg.name`` when that is a module, else of ``pkg``.
    The implicit import of a parent package (``a.b`` before ``a.b.c``) is not counted.
    """
    root = PACKAGE.name
    graph = {name: set() for name in modules}
    for name, tree in modules.items():
        is_package = (PACKAGE.parent / Path(*name.split("."))).is_dir()
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                targets = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom):
                base = _resolve(name, is_package, node)
                targets = [f"{base}.{a.name}" if f"{base}.{a.name}" in modules else base for a in node.names]
            else:
                continue
            graph[name].update(t for t in targets if t.split(".")[0] == root and t in modules and t != name)
    return graph


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One import circle as a list of modules (first == last), or None; depth-first search."""
    state: dict[str, int] = {}  # 1: on the current path, 2: finished
    path: list[str] = []

    def visit(node):
        state[node] = 1
        path.append(node)
        for nxt in sorted(graph[node]):
            if state.get(nxt) == 1:
                return path[path.index(nxt):] + [nxt]
            if nxt not in state and (found := visit(nxt)):
                return found
        path.pop()
        state[node] = 2
        return None

    for start in sorted(graph):
        if start not in state and (found := visit(start)):
            return found
    return None


def long_functions(modules: dict[str, ast.Module]) -> list[str]:
    """``module.function (n lines)`` for every function whose body, docstring excluded, exceeds MAX_BODY."""
    out = []
    for name, tree in modules.items():
        for node in ast.walk(tree):
            if not isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                continue
            body = node.body
            if body and isinstance(body[0], ast.Expr) and isinstance(getattr(body[0], "value", None), ast.Constant) \
                    and isinstance(body[0].value.value, str):
                body = body[1:]
            if body:
                n = node.end_lineno - body[0].lineno + 1
                if n > MAX_BODY:
                    out.append(f"{name}.{node.name} ({n} lines)")
    return out


def test_cycle_finder_finds_a_known_circle():
    # A hand-made graph with one circle (a → b → c → a) and a tail; the finder must return exactly it.
    graph = {"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}
    assert find_cycle(graph) == ["a", "b", "c", "a"]
    assert find_cycle({"a": {"b"}, "b": set()}) is None


def test_graph_counts_function_level_and_relative_imports():
    tree = ast.parse("from . import x\nfrom .io.read import T\ndef f():\n    from ..other import y\n")
    modules = {"attncompress.m": tree, "attncompress.x": ast.parse(""), "attncompress.io.read": ast.parse(""),
               "attncompress.io": ast.parse("")}
    assert import_graph(modules)["attncompress.m"] == {"attncompress.x", "attncompress.io.read"}


def test_no_import_circle():
    cycle = find_cycle(import_graph(_modules()))
    assert cycle is None, "import circle: " + " → ".join(cycle)


def test_no_long_function():
    assert long_functions(_modules()) == []
