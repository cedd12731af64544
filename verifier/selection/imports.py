"""The static import graph: which files import which, read from the source with :mod:`ast`, never run.

The selection stage's safety net where the who-tests-what map is missing or cannot see a change (a
module-level line, a file no test executed in-process): the tests that import a changed module directly
or through other modules. Imports are found anywhere in a file (inside functions too), including
``importlib.import_module("name")`` and ``__import__("name")`` with a literal name; a file that imports a
name it computes (``import_module(__package__ + "._format_" + name)``, a plugin loader) may import any
file, so it counts as importing every file of the tree but the test modules pytest loads itself. A name can mean any
file whose dotted path ends with it, because the folders on ``sys.path`` (the policy's ``python_path``,
those pytest's ``prepend`` import mode inserts for test files) decide which one Python finds (Python's
docs, "The import system"; pytest's docs, "pytest import mechanisms and sys.path/PYTHONPATH"): the
graph may hold an edge too many, never one too few, for a name that resolves inside the tree.
"""

from __future__ import annotations

import ast
import posixpath
from collections.abc import Iterable, Mapping
from dataclasses import dataclass

from verifier.pathglob import pytest_collects_file

ANY_FILE = "*"  # the name a computed dynamic import stands for: it may load any file of the tree


@dataclass(frozen=True)
class ImportGraph:
    """Files and the files they import (repository-relative paths, ``/`` separated)."""

    imports: Mapping[str, frozenset[str]]

    def importers(self, paths: Iterable[str]) -> set[str]:
        """Every file that imports one of ``paths``, directly or through other files (``paths`` excluded)."""
        reverse: dict[str, set[str]] = {}
        for importer, imported in self.imports.items():
            for target in imported:
                reverse.setdefault(target, set()).add(importer)
        start = set(paths)
        seen: set[str] = set()
        todo = list(start)
        while todo:
            for importer in reverse.get(todo.pop(), ()):
                if importer not in seen:
                    seen.add(importer)
                    todo.append(importer)
        return seen - start


def build_graph(sources: Mapping[str, str]) -> ImportGraph:
    """The import graph of the Python files in ``sources`` (path -> text).

    A name matches every file whose dotted path from the tree's root ends with it, so the graph finds
    imports from any folder on ``sys.path`` without knowing which ones are: it may have an edge too
    many, never one too few, for a name that resolves inside the tree.
    """
    index = _suffix_index(sources)
    graph = {path: frozenset(_resolve(path, names, index)) for path, names in _imported_names(sources).items()}
    return ImportGraph(graph)


def dotted_name(path: str) -> str:
    """``src/parcelkit/rates.py`` -> ``src.parcelkit.rates`` (a package's ``__init__.py`` names the package);
    the folders from the root that are not identifiers are left out."""
    if not path.endswith(".py"):
        return ""
    parts = path[: -len(".py")].split("/")
    if parts[-1] == "__init__":
        parts = parts[:-1]
    while parts and not all(part.isidentifier() for part in parts):
        parts = parts[1:]
    return ".".join(parts)


def _suffix_index(sources: Mapping[str, str]) -> dict[str, set[str]]:
    """Every dotted suffix of every file's name (``c``, ``b.c``, ``a.b.c``) -> the files it names."""
    index: dict[str, set[str]] = {}
    for path in sources:
        parts = dotted_name(path).split(".")
        for start in range(len(parts)):
            if parts[start]:
                index.setdefault(".".join(parts[start:]), set()).add(path)
    return index


def _imported_names(sources: Mapping[str, str]) -> dict[str, set[str]]:
    """Per file, the absolute dotted names it may import (with every parent package)."""
    found: dict[str, set[str]] = {}
    for path, text in sources.items():
        try:
            tree = ast.parse(text, filename=path)
        except (SyntaxError, ValueError):
            found[path] = set()
            continue
        found[path] = {name for node in ast.walk(tree) for name in _names_of(node, path)}
    return found


def _names_of(node: ast.AST, path: str) -> list[str]:
    if isinstance(node, ast.Import):
        return [alias.name for alias in node.names]
    if isinstance(node, ast.ImportFrom):
        package = _package_of(path, node.level, node.module)
        if package is None:
            return []
        return [package] + [f"{package}.{alias.name}" if package else alias.name for alias in node.names]
    if isinstance(node, ast.Call) and _is_dynamic_import(node.func) and node.args:
        first = node.args[0]
        if isinstance(first, ast.Constant) and isinstance(first.value, str) and not first.value.startswith("."):
            return [first.value]
        return [ANY_FILE]  # a computed (or relative) name: the graph cannot tell which file it loads
    return []


def _is_dynamic_import(func: ast.expr) -> bool:
    if isinstance(func, ast.Name):
        return func.id in ("__import__", "import_module")
    return isinstance(func, ast.Attribute) and func.attr == "import_module"


def _package_of(path: str, level: int, module: str | None) -> str | None:
    """The absolute package a ``from`` import names; relative ones resolve against ``path``'s folder."""
    if level == 0:
        return module or ""
    folder = posixpath.dirname(path)
    for _ in range(level - 1):
        folder = posixpath.dirname(folder)
    base = dotted_name(folder + "/__init__.py") if folder else ""
    return ".".join(part for part in (base, module or "") if part) or None


def _resolve(path: str, names: set[str], index: Mapping[str, set[str]]) -> set[str]:
    """The files ``names`` can mean, with the packages each one's import runs first."""
    targets: set[str] = set()
    for name in names:
        if name == ANY_FILE:
            targets |= {file for files in index.values() for file in files if not _is_test_module(file)}
            continue
        for candidate in _with_parents(name):
            targets |= index.get(candidate, set())
    targets.discard(path)
    return targets


def _is_test_module(path: str) -> bool:
    """A file pytest loads itself (``test_*.py``, ``*_test.py``, ``conftest.py``): no plugin loader imports it."""
    return pytest_collects_file(path) or posixpath.basename(path) == "conftest.py"


def _with_parents(name: str) -> list[str]:
    """``a.b.c`` -> ``a``, ``a.b``, ``a.b.c``: importing a module runs its packages' ``__init__`` first."""
    parts = name.split(".")
    return [".".join(parts[: i + 1]) for i in range(len(parts)) if parts[i]]
