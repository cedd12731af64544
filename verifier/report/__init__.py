"""Reporters: one module per output format, each turning a Report into text. Nothing here decides anything.

A format module defines ``render(report, **options) -> str``, ``SUFFIX`` (the file name ending a report
of that format gets when several are written into one folder) and ``FOR_MACHINES`` (True when tools
read it: it then goes alone to stdout). Adding a format is one module and one entry in :data:`FORMATS`;
the command line reads its choices from here.
"""

from __future__ import annotations

import importlib
from types import ModuleType
from typing import Any

FORMATS: dict[str, str] = {
    "text": "verifier.report.text",
    "json": "verifier.report.jsonfmt",
    "sarif": "verifier.report.sarif",
    "markdown": "verifier.report.markdown",
    "junit": "verifier.report.junit",
}


def format_module(fmt: str) -> ModuleType:
    """The module of format ``fmt`` (imported on first use)."""
    return importlib.import_module(FORMATS[fmt])


def suffix(fmt: str) -> str:
    return str(format_module(fmt).SUFFIX)


def for_machines(fmt: str) -> bool:
    return bool(format_module(fmt).FOR_MACHINES)


def render(report: Any, fmt: str, **options: Any) -> str:
    return str(format_module(fmt).render(report, **options))
