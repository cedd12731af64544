"""No import cycle anywhere in the package: module-level imports, imports inside functions, imports made
only for type checking, and module names kept in strings (registries read through importlib) all count.

The graph is read from the source with Python's own parser (:mod:`ast`), not by importing anything, so a
cycle that only a rarely taken function would close is found as well. An import of ``a.b.c`` also runs
the packages ``a`` and ``a.b`` first (the import system's documented order), so it is an edge to each,
except to the importer's own enclosing packages: those are always initialised before any of their modules
can run (an explicit ``from a import x`` inside ``a.b`` still counts).
"""

from __future__ import annotations

import ast
import re
from collections.abc import Iterator
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
PACKAGE = ROOT / "verifier"
MODULE_NAME = re.compile(r"verifier(\.[A-Za-z_]\w*)+(:[A-Za-z_]\w*)?")


def module_files() -> dict[str, Path]:
    modules = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = path.relative_to(ROOT).with_suffix("").parts
        name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
        modules[name] = path
    return modules


def _module_strings(tree: ast.Module) -> Iterator[str]:
    """Module names kept in strings to be imported later: ``"pkg.mod:attr"`` anywhere, the argument of
    ``import_module(...)``, and the items of module-level tuples, lists and dict values (registries). A
    plain string constant that happens to look like a module name (a label) is not an import."""
    registries = [
        node.value for node in tree.body if isinstance(node, (ast.Assign, ast.AnnAssign)) and node.value is not None
    ]
    for node in ast.walk(tree):
        if isinstance(node, ast.Constant) and isinstance(node.value, str) and ":" in node.value:
            yield node.value
        elif isinstance(node, ast.Call) and getattr(node.func, "attr", getattr(node.func, "id", "")) == "import_module":
            yield from (arg.value for arg in node.args[:1] if isinstance(arg, ast.Constant))
    for value in registries:
        items = value.values if isinstance(value, ast.Dict) else getattr(value, "elts", [])
        yield from (item.value for item in items if isinstance(item, ast.Constant))


def imported_names(name: str, path: Path, known: set[str]) -> Iterator[str]:
    """Every module ``name`` may import: import statements anywhere in the file, and module names in strings."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            yield from (alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")[: len(package.split(".")) - node.level + 1]
                base = ".".join([*anchor, *([base] if base else [])])
            submodules = [f"{base}.{alias.name}" for alias in node.names if f"{base}.{alias.name}" in known]
            if len(submodules) < len(node.names):  # a name defined by the package itself: it must be run
                yield base
            yield from submodules
    for text in _module_strings(tree):
        if isinstance(text, str) and MODULE_NAME.fullmatch(text):
            yield text.partition(":")[0]


def import_graph() -> dict[str, set[str]]:
    modules = module_files()
    known = set(modules)
    graph: dict[str, set[str]] = {}
    for name, path in modules.items():
        edges = set()
        enclosing = {".".join(name.split(".")[:end]) for end in range(1, name.count(".") + 1)}
        for target in imported_names(name, path, known):
            if target in known and target != name:
                edges.add(target)
            parts = target.split(".")
            for end in range(1, len(parts)):  # the packages on the way run first
                prefix = ".".join(parts[:end])
                if prefix in known and prefix not in enclosing and prefix != name:
                    edges.add(prefix)
        graph[name] = edges
    return graph


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One cycle of ``graph`` as a path that starts and ends at the same module, else None."""
    state: dict[str, int] = {}  # 1: on the current path, 2: finished
    path: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        path.append(node)
        for target in sorted(graph.get(node, ())):
            if state.get(target) == 1:
                return [*path[path.index(target) :], target]
            if target not in state:
                found = visit(target)
                if found:
                    return found
        path.pop()
        state[node] = 2
        return None

    for start in sorted(graph):
        if start not in state:
            found = visit(start)
            if found:
                return found
    return None


def test_the_package_has_no_import_cycle() -> None:
    graph = import_graph()
    assert len(graph) > 50  # the walk saw the package
    cycle = find_cycle(graph)
    assert cycle is None, "import cycle: " + " -> ".join(cycle or ())


def test_the_rules_never_import_the_policy_or_the_verdict_stage() -> None:
    graph = import_graph()
    for name, edges in graph.items():
        if name == "verifier.rules" or name.startswith("verifier.rules."):
            assert not {e for e in edges if e.startswith(("verifier.policy", "verifier.verdict"))}, name


def test_the_cycle_finder_finds_a_cycle_made_by_a_function_level_import(tmp_path: Path) -> None:
    """The checker itself: a cycle closed only inside a function, and one through a string, are found."""
    (tmp_path / "a.py").write_text("import b\n")
    (tmp_path / "b.py").write_text("def later():\n    import a\n")
    (tmp_path / "c.py").write_text("REGISTRY = {'x': 'verifier.d:Thing'}\n")
    known = {"a", "b", "c", "verifier.d"}
    graph = {name: set(imported_names(name, tmp_path / f"{name}.py", known)) for name in ("a", "b", "c")}
    assert find_cycle(graph) == ["a", "b", "a"]
    assert graph["c"] == {"verifier.d"}
