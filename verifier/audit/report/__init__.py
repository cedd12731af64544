"""Reporters of the audit: one module per format, each turning an :class:`verifier.audit.build.Audit` into text."""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING

from verifier.audit.report.numbers import percent

__all__ = ["FORMATS", "SUFFIX", "percent", "render"]

if TYPE_CHECKING:  # the CLI imports this package for the subcommand's arguments; the audit itself is lazy
    from verifier.audit.model import Audit

FORMATS = {
    "markdown": "verifier.audit.report.markdown:render",
    "json": "verifier.audit.report.jsonfmt:render",
    "csv": "verifier.audit.report.csvfmt:render",
    "html": "verifier.audit.report.html:render",
}
SUFFIX = {"markdown": "md", "json": "json", "csv": "csv", "html": "html"}


def render(audit: Audit, fmt: str) -> str:
    module_name, function = FORMATS[fmt].split(":")
    return str(getattr(importlib.import_module(module_name), function)(audit))
