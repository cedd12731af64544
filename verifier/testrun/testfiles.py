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

from verifier.pathglob import matches_any, pytest_collects_file
from verifier.rules.weakened import read_module

IsTestCode = Callable[[str], bool]


def classify_test_code(patterns: tuple[str, ...], sources: Mapping[str, str]) -> IsTestCode:
    """A predicate: is this repository path test code (kept out of coverage and mutants)? Each path is
    decided once per check (the coverage summary and the mutation stage both ask)."""
    decided: dict[str, bool] = {}

    def is_test_code(path: str) -> bool:
        if path not in decided:
            decided[path] = _is_test_code(path, patterns, sources)
        return decided[path]

    return is_test_code


def _is_test_code(path: str, patterns: tuple[str, ...], sources: Mapping[str, str]) -> bool:
    if not matches_any(path, patterns):
        return False
    if PurePosixPath(path).name == "conftest.py" or not pytest_collects_file(path):
        return True
    return path not in sources or defines_tests(sources[path])


def defines_tests(source: str) -> bool:
    """Whether pytest would collect a test from this module, as the weakened-tests rule reads a test module
    (:func:`verifier.rules.weakened.read_module`: ``test`` functions, ``Test`` classes without ``__init__``,
    ``unittest.TestCase`` subclasses, ``__test__ = False`` honoured)."""
    try:
        tree = ast.parse(source)
    except (SyntaxError, ValueError):
        return True  # pytest reports it as a collection error, which fails the run
    return any(not function.uncollected for function in read_module(tree).functions.values())
