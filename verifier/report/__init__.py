"""Reporters: one module per output format, each turning a Report into text. Nothing here decides anything."""

from __future__ import annotations

FORMATS = {
    "text": "verifier.report.text:render",
    "json": "verifier.report.jsonfmt:render",
    "sarif": "verifier.report.sarif:render",
    "markdown": "verifier.report.markdown:render",
    "junit": "verifier.report.junit:render",
}


def render(report, fmt: str, **options) -> str:  # type: ignore[no-untyped-def]
    import importlib

    module_name, function = FORMATS[fmt].split(":")
    return getattr(importlib.import_module(module_name), function)(report, **options)
