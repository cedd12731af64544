"""Which files are test code: those pytest would collect tests from, not a name pattern alone.

Coverage and the mutation stage judge code and leave tests alone. A name pattern by itself is a way out:
code placed in ``mypackage/test_pricing.py`` would be skipped by both. So a file matching the policy's
test patterns (``coverage.exclude``) counts as test code only when it is a ``conftest.py``, a helper module
(not named like a test module), or a test module that defines something pytest collects: a ``test``
function or a ``Test`` class at module level (pytest's documented default ``python_functions`` and
``python_classes``), or a ``unittest.TestCase`` subclass of any name (pytest collects those too). A
test-named module with no test in it is code, and judged as code.

The answer depends on the committed source only, never on which tests a run (or a part of one) executed,
so every part of a split run plans the same mutants.
"""

from __future__ import annotations

import ast
from collections.abc import Callable, Mapping
from pathlib import PurePosixPath

from verifier.pathglob import matches_any

IsTestCode = Callable[[str], bool]


def classify_test_code(patterns: tuple[str, ...], sources: Mapping[str, str]) -> IsTestCode:
    """A predicate: is this repository path test code (kept out of coverage and mutants)?"""

    def is_test_code(path: str) -> bool:
        if not matches_any(path, patterns):
            return False
        name = PurePosixPath(path).name
        if name == "conftest.py" or not _test_module_name(name):
            return True
        return path not in sources or defines_tests(sources[path])

    return is_test_code


def defines_tests(source: str) -> bool:
    """Whether pytest's default rules would collect a test from this module's top level."""
    try:
        tree = ast.parse(source)
    except (SyntaxError, ValueError):
        return True  # pytest reports it as a collection error, which fails the run
    for node in tree.body:
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)) and node.name.startswith("test"):
            return True
        if isinstance(node, ast.ClassDef) and (node.name.startswith("Test") or _test_case_subclass(node)):
            return True
    return False


def _test_case_subclass(node: ast.ClassDef) -> bool:
    """A class deriving from a ``...TestCase`` (unittest's and its kin): pytest collects it whatever its name."""
    for base in node.bases:
        name = base.attr if isinstance(base, ast.Attribute) else base.id if isinstance(base, ast.Name) else ""
        if name.endswith("TestCase"):
            return True
    return False


def _test_module_name(name: str) -> bool:
    """pytest's default ``python_files`` (``test_*.py``, ``*_test.py``; pytest's documentation)."""
    return name.endswith(".py") and (name.startswith("test_") or name.endswith("_test.py"))
