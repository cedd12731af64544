"""Path globs as the policy and the scope trailer write them (``*``, ``**``, ``?``, ``dir/``).

The matcher itself lives with the trailer parser (it is on the commit hook's fast path); this module
is the name the other stages use.
"""

from __future__ import annotations

from collections.abc import Iterable


def matches_any(path: str, globs: Iterable[str]) -> bool:
    """True when ``path`` (relative to the repository root, '/'-separated) matches one of ``globs``."""
    from verifier.trailers import path_in_scope

    return any(path_in_scope(path, (glob,)) for glob in globs)
