"""The rule registry: every rule has a stable id, a default setting, an explanation and a ``check``.

Adding a rule is one function decorated with :func:`rule` in a module of this package (listed in
``_FAMILIES``) and one test. A rule's check receives a :class:`RuleContext` and returns findings; the
severity it reports is replaced by the policy's setting for the rule (block, warn or off).
"""

from __future__ import annotations

import importlib
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field, replace
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

_FAMILIES = (
    "verifier.rules.tests",
    "verifier.rules.coverage",
    "verifier.rules.code",
    "verifier.rules.calls",
    "verifier.rules.paths",
    "verifier.rules.weakened",
    "verifier.rules.harness",
    "verifier.rules.size",
    "verifier.rules.deps",
    "verifier.rules.secrets",
    "verifier.rules.regressions",
    "verifier.rules.mutation",
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

    def option(self, policy: Policy, name: str, path: str | None = None) -> Any:
        """The policy's value of one of this rule's options (at ``path``, after the per-path overrides
        that match it, when given), else the rule's default."""
        if path is None or not policy.overrides:
            return policy.rule_options.get(self.id, {}).get(name, self.options[name])
        from verifier.policy.loader import policy_for_path

        return policy_for_path(policy, path).option(self.id, name, self.options[name])


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
) -> Callable[[Callable[[RuleContext], Iterable[Finding]]], Callable[[RuleContext], Iterable[Finding]]]:
    """Register the decorated function as the check of rule ``rule_id``; its docstring explains it."""

    def register(check: Callable[[RuleContext], Iterable[Finding]]) -> Callable[[RuleContext], Iterable[Finding]]:
        explanation = " ".join((check.__doc__ or "").split())
        REGISTRY[rule_id] = Rule(
            rule_id, default, summary, explanation, stage, check, fixed, dict(options or {}), sources
        )
        return check

    return register


def load_all() -> Mapping[str, Rule]:
    for module in _FAMILIES:
        importlib.import_module(module)
    return REGISTRY


def apply_rules(stage: str, context: RuleContext) -> list[Finding]:
    """Run every enabled rule of ``stage`` and give each finding the severity the policy sets for its
    path (per-path overrides included); a finding a waiver covers becomes ``info``."""
    from verifier.policy.loader import enabled_anywhere, judge_finding

    findings: list[Finding] = []
    policy = context.policy
    for registered in load_all().values():
        if registered.stage != stage:
            continue
        if not registered.fixed and not enabled_anywhere(policy, registered.id, registered.default):
            continue
        for finding in registered.check(context):
            judged = judge_finding(policy, registered.id, registered.default, registered.fixed, finding)
            if judged is not None:
                findings.append(_capped(judged))
    return findings


def _capped(finding: Finding) -> Finding:
    """A finding that says ``details["max_severity"] = "warn"`` never blocks (e.g. a changed expected value,
    which may be a legitimate fix): the rule's setting applies up to that cap."""
    if finding.severity == "block" and finding.details.get("max_severity") == "warn":
        return replace(finding, severity="warn")
    return finding
