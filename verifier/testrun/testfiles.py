"""Which files are test code: what pytest collected, not a name pattern alone.

Coverage and the mutation stage judge code and leave tests alone. A name pattern by itself is a way out:
code placed in ``mypackage/test_pricing.py`` (pytest collects nothing there) would be skipped by both. So a
file counts as test code when it matches the policy's test patterns (``coverage.exclude``) *and* the run
shows it is part of the tests: pytest collected a test from it, it is a ``conftest.py``, or it is a helper
module (not named like a test module) in a folder pytest collected tests from.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import PurePosixPath

from verifier.models import RunResult
from verifier.pathglob import matches_any

IsTestCode = Callable[[str], bool]


def collected_files(run: RunResult | None) -> frozenset[str]:
    """The files pytest collected the run's tests from (the file part of each node id)."""
    if run is None:
        return frozenset()
    return frozenset(test.node_id.split("::", 1)[0] for test in run.tests)


def classify_test_code(run: RunResult | None, patterns: tuple[str, ...]) -> IsTestCode:
    """A predicate: is this repository path test code (kept out of coverage and mutants)?"""
    files = collected_files(run)
    folders = frozenset(str(PurePosixPath(path).parent) for path in files)

    def is_test_code(path: str) -> bool:
        if not matches_any(path, patterns):
            return False
        name = PurePosixPath(path).name
        if path in files or name == "conftest.py":
            return True
        # a helper next to the collected tests is test code; a test-named module pytest found no test in is not
        return str(PurePosixPath(path).parent) in folders and not _test_module_name(name)

    return is_test_code


def _test_module_name(name: str) -> bool:
    """pytest's default ``python_files`` (``test_*.py``, ``*_test.py``; pytest's documentation)."""
    return name.endswith(".py") and (name.startswith("test_") or name.endswith("_test.py"))
