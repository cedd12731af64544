"""The rule registry: every rule has a stable id, a default setting, an explanation and a ``check``.

Adding a rule is one function decorated with :func:`rule` in a module of this package (listed in
:data:`verifier.rules.catalog.FAMILIES`, which loads them) and one test. A rule's check receives a
:class:`RuleContext` and returns raw findings: how much a finding weighs (the policy's setting at its
path, waivers, caps) is decided afterwards, in one place, by :mod:`verifier.verdict.judge`. The rules
never import the policy or the verdict stage.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

from verifier.models import (
    Change,
    CoverageSummary,
    Finding,
    MutationResult,
    Policy,
    Provenance,
    RuleSetting,
    RunResult,
)


@dataclass(frozen=True)
class RuleContext:
    """What a rule may look at; ``run`` and ``coverage`` are None for the static rules."""

    change: Change
    provenance: Provenance
    policy: Policy
    head_sources: Mapping[str, str] = field(default_factory=dict)  # path -> head text, every changed text file
    base_sources: Mapping[str, str] = field(default_factory=dict)  # base path -> base text, every changed text file
    run: RunResult | None = None
    coverage: CoverageSummary | None = None
    # reads a file the change did not touch at the base revision (None when absent); None: not available
    read_base: Callable[[str], str | None] | None = None
    mutation: MutationResult | None = None  # the mutation stage's outcomes (rules of stage "mutation")
    # the waiver (as a finding's details["waived_by"] holds it) that covers a finding, given by the verdict
    # stage to the rules that must count waived findings apart (the mutation score); the rules never judge
    waiver_of: Callable[[Finding], Mapping[str, str] | None] | None = None


EntryCheck = Callable[[Any], list[str]]


@dataclass(frozen=True)
class Rule:
    """A registered rule."""

    id: str
    default: RuleSetting
    summary: str
    explanation: str
    stage: str  # "static" (no execution), "dynamic" (reads the test run) or "mutation" (reads the mutants)
    check: Callable[[RuleContext], Iterable[Finding]]
    fixed: bool = False  # a fixed rule cannot be switched off: it is how the gate fails closed
    options: Mapping[str, Any] = field(default_factory=dict)  # option name -> default value
    sources: tuple[str, ...] = ()  # where the rule's facts come from (CWE ids, Python's documentation, ...)
    # option name -> a check of each entry of that (list) option, giving its problems; the policy loader
    # runs it so that a bad entry is reported at its own line of the policy file
    entry_checks: Mapping[str, EntryCheck] = field(default_factory=dict)

    def option(self, policy: Policy, name: str) -> Any:
        """The policy's value of one of this rule's options, else the rule's default."""
        return policy.rule_options.get(self.id, {}).get(name, self.options[name])


REGISTRY: dict[str, Rule] = {}


def rule(
    rule_id: str,
    *,
    default: RuleSetting,
    summary: str,
    stage: str,
    fixed: bool = False,
    options: Mapping[str, Any] | None = None,
    sources: tuple[str, ...] = (),
    entry_checks: Mapping[str, EntryCheck] | None = None,
) -> Callable[[Callable[[RuleContext], Iterable[Finding]]], Callable[[RuleContext], Iterable[Finding]]]:
    """Register the decorated function as the check of rule ``rule_id``; its docstring explains it."""

    def register(check: Callable[[RuleContext], Iterable[Finding]]) -> Callable[[RuleContext], Iterable[Finding]]:
        explanation = " ".join((check.__doc__ or "").split())
        REGISTRY[rule_id] = Rule(
            rule_id,
            default,
            summary,
            explanation,
            stage,
            check,
            fixed,
            dict(options or {}),
            sources,
            dict(entry_checks or {}),
        )
        return check

    return register
