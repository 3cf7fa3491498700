"""The layout rules of DEVELOPERS.md, read from the sources with ``ast``: one-way layers, no cycles, small modules.

* ``control`` imports ``sysid``, never the reverse.
* No import cycle among the modules of the two packages (imports inside functions count; ``TYPE_CHECKING`` blocks
  do not).
* No source module over 500 lines, no function over 60 lines (its docstring excluded).
"""

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = {"sysid": "stimsteer.sysid", "control": "stimsteer.control"}
MAX_MODULE_LINES = 500
MAX_FUNCTION_LINES = 60


def _modules() -> dict:
    """Module name -> (path, is_package) for every source file of both packages."""
    found = {}
    for folder, dotted in PACKAGES.items():
        for path in sorted((ROOT / folder).rglob("*.py")):
            rel = path.relative_to(ROOT / folder).with_suffix("")
            parts = [p for p in rel.parts if p != "__init__"]
            found[".".join([dotted, *parts])] = (path, path.name == "__init__.py")
    return found


def _is_type_checking(node) -> bool:
    test = node.test
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING")


def _import_nodes(tree):
    stack = [tree]
    while stack:
        node = stack.pop()
        if isinstance(node, ast.If) and _is_type_checking(node):
            stack.extend(node.orelse)
            continue
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            yield node
        stack.extend(ast.iter_child_nodes(node))


def _targets(name: str, is_package: bool, node, modules) -> set:
    if isinstance(node, ast.Import):
        return {a.name for a in node.names if a.name in modules}
    if node.level:
        base = name.split(".") if is_package else name.split(".")[:-1]
        base = base[:len(base) - (node.level - 1)]
        target = ".".join(base + ([node.module] if node.module else []))
    else:
        target = node.module or ""
    out = {target} if target in modules else set()
    out |= {f"{target}.{a.name}" for a in node.names if f"{target}.{a.name}" in modules}
    return out


def _graph() -> dict:
    modules = _modules()
    graph = {}
    for name, (path, is_package) in modules.items():
        tree = ast.parse(path.read_text(encoding="utf-8"))
        edges = set()
        for node in _import_nodes(tree):
            edges |= _targets(name, is_package, node, modules)
            if isinstance(node, ast.ImportFrom) and node.level == 0 and (node.module or "").startswith("stimsteer"):
                edges.add(node.module)
        graph[name] = edges - {name}
    return graph


def _cycles(graph) -> list:
    """Strongly connected components with more than one module (Tarjan 1972)."""
    index, low, on, stack, out = {}, {}, set(), [], []

    def visit(v):
        index[v] = low[v] = len(index)
        stack.append(v)
        on.add(v)
        for w in graph.get(v, ()):
            if w not in graph:
                continue
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                out.append(sorted(comp))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return out


def test_the_identification_layer_never_imports_the_control_layer():
    bad = sorted(f"{src} -> {dst}" for src, dsts in _graph().items() if src.startswith("stimsteer.sysid")
                 for dst in dsts if dst.startswith("stimsteer.control"))
    assert not bad, "sysid imports control: " + "; ".join(bad)


def test_there_is_no_import_cycle():
    cycles = _cycles(_graph())
    assert not cycles, "import cycles: " + " | ".join(" <-> ".join(c) for c in cycles)


def test_the_cycle_finder_finds_a_cycle():
    # the checker itself: a graph with a known cycle (a -> b -> c -> a) and a tail (c -> d)
    assert _cycles({"a": {"b"}, "b": {"c"}, "c": {"a", "d"}, "d": set()}) == [["a", "b", "c"]]


def _function_lengths(path: Path):
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for node in ast.walk(tree):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
            body = node.body
            doc = 0
            if body and isinstance(body[0], ast.Expr) and isinstance(body[0].value, ast.Constant) \
                    and isinstance(body[0].value.value, str):
                doc = body[0].end_lineno - body[0].lineno + 1
            yield node.name, node.lineno, node.end_lineno - node.lineno + 1 - doc


@pytest.mark.parametrize("folder", sorted(PACKAGES))
def test_modules_and_functions_stay_small(folder):
    big_modules, big_functions = [], []
    for path in sorted((ROOT / folder).rglob("*.py")):
        n = len(path.read_text(encoding="utf-8").splitlines())
        if n > MAX_MODULE_LINES:
            big_modules.append(f"{path.relative_to(ROOT)} ({n} lines)")
        big_functions += [f"{path.relative_to(ROOT)}:{line} {name} ({length} lines)"
                          for name, line, length in _function_lengths(path) if length > MAX_FUNCTION_LINES]
    assert not big_modules, f"modules over {MAX_MODULE_LINES} lines: {big_modules}"
    assert not big_functions, f"functions over {MAX_FUNCTION_LINES} lines: {big_functions}"
