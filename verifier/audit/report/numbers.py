"""How the audit's reporters write numbers (one place, so that every format says the same)."""

from __future__ import annotations


def percent(value: float | None) -> str:
    return "n/a" if value is None else f"{value:g}%"


def count(value: int | None) -> str:
    """A count, or "n/a" when there is no data (never a zero that was not counted)."""
    return "n/a" if value is None else str(value)
