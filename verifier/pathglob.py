"""Path globs as the policy and the scope trailer write them (``*``, ``**``, ``?``, ``dir/``).

The pattern compiler lives with the trailer parser (it is on the commit hook's fast path); this module
gives the other stages one matcher for a list of globs, compiled once into a single regex, and the one
test of pytest's default test file names.
"""

from __future__ import annotations

import fnmatch
import functools
import re
from collections.abc import Callable, Iterable


def matches_any(path: str, globs: Iterable[str]) -> bool:
    """True when ``path`` (relative to the repository root, '/'-separated) matches one of ``globs``."""
    return glob_matcher(tuple(globs))(path)


@functools.lru_cache(maxsize=64)
def glob_matcher(globs: tuple[str, ...]) -> Callable[[str], bool]:
    """``matches_any(path, globs)`` as one compiled regex (the rules test every changed path against dozens
    of globs). Same semantics as the scope globs: a pattern without wildcards, or ending in '/', also
    covers everything under it."""
    from verifier.provenance.trailers import _compile

    parts: list[str] = []
    for glob in globs:
        regex, has_wildcards = _compile(glob)
        if regex is None:
            return lambda _path: True
        if glob.endswith("/"):
            parts.append(f"(?:{regex.pattern})/.*")
        elif has_wildcards:
            parts.append(f"(?:{regex.pattern})")
        else:
            parts.append(f"(?:{regex.pattern})(?:/.*)?")
    if not parts:
        return lambda _path: False
    combined = re.compile("|".join(parts), re.DOTALL)
    return lambda path: combined.fullmatch(path) is not None


# pytest's default ``python_files`` (pytest's documentation, "Conventions for Python test discovery")
PYTEST_FILES = ("test_*.py", "*_test.py")


def pytest_collects_file(path: str) -> bool:
    """Whether pytest's default file pattern matches ``path`` (it matches the base name)."""
    name = path.rsplit("/", 1)[-1]
    return any(fnmatch.fnmatchcase(name, pattern) for pattern in PYTEST_FILES)
