"""Counted nouns for messages, in one place: ``counted(1, "file")`` is "1 file", ``counted(2, "file")`` "2 files".

Plain standard library only: the commit hook's fast path may import it.
"""

from __future__ import annotations


def plural(count: int, noun: str, many: str | None = None) -> str:
    """``noun`` as it goes with ``count``: itself for one, else ``many`` (default: ``noun`` + "s")."""
    return noun if count == 1 else many or f"{noun}s"


def counted(count: int, noun: str, many: str | None = None) -> str:
    """The count and the noun that agrees with it: "1 file", "0 files", "3 test files"."""
    return f"{count} {plural(count, noun, many)}"
