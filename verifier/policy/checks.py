"""The checks of single policy values: each takes a value and returns the problem, or None when it is fine.

Numbers must be finite and inside their range (NaN, infinity and integers past any sensible value are
refused); every message quotes the value in a shortened form (:func:`shown`), so that a huge value (a
YAML alias bomb expands to billions of items) never makes a huge message.
"""

from __future__ import annotations

import math
import re
import reprlib
from collections.abc import Callable, Mapping
from datetime import date, datetime
from typing import Any

Check = Callable[[Any], str | None]  # returns the problem, or None when the value is fine

RULE_SETTINGS = ("block", "advise", "ignore")
RENAMED_SETTINGS = {"warn": "advise", "off": "ignore"}  # an older policy's spelling -> ours
MAX_SHOWN = 80  # characters of a value a message quotes
# the largest whole number a rule option may hold: past it no count, size or limit makes sense
MAX_WHOLE_NUMBER = 10**12

_SHORT = reprlib.Repr()
_SHORT.maxstring = 60
_SHORT.maxother = 60
_SHORT.maxlong = 40
_SHORT.maxlist = _SHORT.maxdict = _SHORT.maxtuple = _SHORT.maxset = 6
_SHORT.maxlevel = 3


def shown(value: Any) -> str:
    """``value`` quoted for a message, at most :data:`MAX_SHOWN` characters (nested values cut short)."""
    text = _SHORT.repr(value)
    return text if len(text) <= MAX_SHOWN else text[: MAX_SHOWN - 3] + "..."


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def number(low: float, high: float) -> Check:
    """A finite number from ``low`` to ``high``."""

    def check(value: Any) -> str | None:
        if not _is_number(value):
            return f"expected a number, got {shown(value)}"
        if isinstance(value, float) and not math.isfinite(value):
            return f"expected a finite number from {low:g} to {high:g}, got {shown(value)}"
        if not low <= value <= high:
            return f"expected a number from {low:g} to {high:g}, got {shown(value)}"
        return None

    return check


def integer(value: Any) -> str | None:
    if not isinstance(value, int) or isinstance(value, bool):
        return f"expected a whole number, got {shown(value)}"
    if abs(value) > MAX_WHOLE_NUMBER:
        return f"expected a whole number from {-MAX_WHOLE_NUMBER} to {MAX_WHOLE_NUMBER}, got {shown(value)}"
    return None


def any_number(value: Any) -> str | None:
    """A finite number (a rule option with a float default)."""
    if not _is_number(value):
        return f"expected a number, got {shown(value)}"
    if isinstance(value, float) and not math.isfinite(value):
        return f"expected a finite number, got {shown(value)}"
    return integer(value) if isinstance(value, int) else None


def string(value: Any) -> str | None:
    return None if isinstance(value, str) else f"expected a string, got {shown(value)}"


def text(value: Any) -> str | None:
    return None if isinstance(value, str) and value.strip() else f"expected a non-empty string, got {shown(value)}"


def string_list(value: Any) -> str | None:
    if not isinstance(value, list) or not all(isinstance(item, str) for item in value):
        return f"expected a list of strings, got {shown(value)}"
    return None


def glob_list(value: Any) -> str | None:
    problem = string_list(value)
    return problem or (None if value else "expected at least one path glob")


def boolean(value: Any) -> str | None:
    return None if isinstance(value, bool) else f"expected true or false, got {shown(value)}"


def rule_setting(value: Any) -> str | None:
    if value in RENAMED_SETTINGS:
        return f"the setting '{value}' was renamed '{RENAMED_SETTINGS[value]}'; write {RENAMED_SETTINGS[value]}"
    return None if value in RULE_SETTINGS else f"expected one of {', '.join(RULE_SETTINGS)}, got {shown(value)}"


def version(value: Any) -> str | None:
    return None if value == 1 else f"this verifier reads policy version 1, got {shown(value)}"


_DATE = re.compile(r"\d{4}-\d{2}-\d{2}")


def expiry(value: Any) -> str | None:
    if isinstance(value, date) and not isinstance(value, datetime):
        return None
    if isinstance(value, str) and _DATE.fullmatch(value):
        try:
            date.fromisoformat(value)
            return None
        except ValueError:
            pass
    return f"expected a date written YYYY-MM-DD, got {shown(value)}"


def one_of(*choices: str) -> Check:
    def check(value: Any) -> str | None:
        return None if value in choices else f"expected one of {', '.join(choices)}, got {shown(value)}"

    return check


def workers(value: Any) -> str | None:
    return None if value == "auto" else number(1, 256)(value)


# --- rule options: the check follows the type of the option's default -------------------------------


def option_check(default: Any) -> Check:
    """The check of a rule option, from the type of its default (bool, int, float, str, list, mapping)."""
    if isinstance(default, bool):
        return boolean
    if isinstance(default, int):
        return integer
    if isinstance(default, float):
        return any_number
    if isinstance(default, str):
        return string
    if isinstance(default, (list, tuple)):
        return _list_like(default)
    if isinstance(default, Mapping):
        return plain_mapping
    return lambda _value: None


def _list_like(default: list[Any] | tuple[Any, ...]) -> Check:
    def check(value: Any) -> str | None:
        if not isinstance(value, list):
            return f"expected a list, got {shown(value)}"
        if all(isinstance(item, str) for item in value) and not any(isinstance(d, Mapping) for d in default):
            return None
        if all(isinstance(item, Mapping) for item in value) and not any(isinstance(d, str) for d in default):
            problems = [p for item in value if (p := plain_mapping(item))]
            return problems[0] if problems else None
        kind = "mappings" if any(isinstance(d, Mapping) for d in default) else "strings"
        return f"expected a list of {kind}, got {shown(value)}"

    return check


def plain_mapping(value: Any) -> str | None:
    """Light validation of a mapping option (e.g. a banned-call entry): string keys, plain values."""
    if not isinstance(value, Mapping) or not all(isinstance(k, str) for k in value):
        return f"expected a mapping with string keys, got {shown(value)}"
    bad = [item for item in value.values() if not _is_plain(item)]
    return f"expected plain values (strings, numbers, lists, mappings), got {shown(bad[0])}" if bad else None


def _is_plain(value: Any) -> bool:
    if isinstance(value, list):
        return all(_is_plain(item) for item in value)
    if isinstance(value, Mapping):
        return all(isinstance(k, str) and _is_plain(v) for k, v in value.items())
    if isinstance(value, float):
        return math.isfinite(value)
    return value is None or isinstance(value, (str, int, bool))
