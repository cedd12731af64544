"""Read TOML text (``pyproject.toml``) with the standard library's reader, or ``tomli`` before Python 3.11."""

from __future__ import annotations

import sys
from typing import Any

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib


def load_toml(text: str) -> dict[str, Any] | None:
    """The document as plain data, or None when it is not valid TOML (the rules then skip it)."""
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError:
        return None
