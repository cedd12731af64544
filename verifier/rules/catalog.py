"""The catalogue of rule families: which modules hold rules, loading them, and running a stage's rules.

The registry itself (:mod:`verifier.rules`) names no family, so that a family module can import it
without a cycle; this module imports the families (in this order: it is the findings' order).
"""

from __future__ import annotations

import importlib
from collections.abc import Callable, Mapping

from verifier.models import Finding
from verifier.rules import REGISTRY, Rule, RuleContext

FAMILIES = (
    "verifier.rules.tests",
    "verifier.rules.coverage",
    "verifier.rules.code",
    "verifier.rules.calls",
    "verifier.rules.paths",
    "verifier.rules.weakened",
    "verifier.rules.strength",
    "verifier.rules.harness",
    "verifier.rules.size",
    "verifier.rules.deps",
    "verifier.rules.secrets",
    "verifier.rules.tampering",
    "verifier.rules.marks",
    "verifier.rules.census",
    "verifier.rules.regressions",
    "verifier.rules.mutation",
)


def load_all() -> Mapping[str, Rule]:
    """Every registered rule, by id (the families are imported on the first call)."""
    for module in FAMILIES:
        importlib.import_module(module)
    return REGISTRY


def closest_rule_id(text: str) -> str | None:
    """The registered rule id nearest to ``text`` (a likely typo), or None when none is close."""
    import difflib

    close = difflib.get_close_matches(text, list(load_all()), n=1)
    return close[0] if close else None


def run_rules(stage: str, context: RuleContext, enabled: Callable[[Rule], bool] = lambda _rule: True) -> list[Finding]:
    """The raw findings of every rule of ``stage`` that ``enabled`` lets run, in the registry's order."""
    findings: list[Finding] = []
    for registered in load_all().values():
        if registered.stage == stage and enabled(registered):
            findings.extend(registered.check(context))
    return findings
