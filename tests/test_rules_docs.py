"""docs/rules.md documents every static rule of issue 4, and each rule has what `policy explain` shows."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from verifier.rules.catalog import load_all

DOC = Path(__file__).resolve().parent.parent / "docs" / "rules.md"
STATIC_RULES = [
    "calls.banned",
    "paths.protected",
    "tests.weakened",
    "tests.cannot-fail",
    "tests.dead-check",
    "tests.swallowed-errors",
    "config.harness",
    "patch.size",
    "deps.added",
    "secrets.literal",
    "tamper.means",
    "tamper.hidden-code",
    "marks.misplaced",
    "marks.scope-unmatched",
    "code.syntax",
]


@pytest.mark.parametrize("rule_id", STATIC_RULES)
def test_rule_is_documented_and_explained(rule_id: str) -> None:
    registered = load_all()[rule_id]
    text = DOC.read_text(encoding="utf-8")
    row = re.search(rf"^\| `{re.escape(rule_id)}` \| (\w+)", text, re.MULTILINE)
    assert row is not None and row.group(1) == registered.default, rule_id
    assert registered.explanation and registered.stage == "static"
    for option in registered.options:
        assert f"`{option}`" in text, (rule_id, option)
    for source in registered.sources:
        cwe = re.match(r"CWE-\d+$", source)
        assert cwe is None or source in text, (rule_id, source)
