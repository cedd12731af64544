"""Each finding's severity, decided in one place: the rule's setting at the finding's path (per-path
overrides included), then a waiver (the finding becomes ``info``, saying who waived it until when; a waiver
past its date waives nothing, and the finding says it lapsed), then
the caps: a failure that already happens at base warns (unless the policy blocks those too), and a
finding that says it may at most warn never blocks.

The rules report raw findings; :func:`apply_rules` runs the rules a policy enables and judges what they
report, which is what the pipeline calls once per rule stage (static, dynamic).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import replace

from verifier.models import Finding, Policy, RuleSetting, Severity
from verifier.rules import Rule, RuleContext
from verifier.rules.catalog import load_all, run_rules
from verifier.verdict.settings import enabled_anywhere, settings_for_path
from verifier.verdict.waivers import expired_waiver_for, lapsed_note, waiver_for, waiver_record


def apply_rules(stage: str, context: RuleContext) -> list[Finding]:
    """Run every rule of ``stage`` the policy enables somewhere and judge each finding."""
    policy = context.policy
    raw = run_rules(stage, context, enabled=lambda registered: is_enabled(policy, registered))
    return judge(policy, raw)


def is_enabled(policy: Policy, registered: Rule) -> bool:
    """A fixed rule always runs; another runs unless the policy switches it off everywhere."""
    return registered.fixed or enabled_anywhere(policy, registered.id, registered.default)


def judge(policy: Policy, findings: Iterable[Finding]) -> list[Finding]:
    """The findings with their judged severity, in order; a finding whose rule is off at its path is dropped.
    A finding of a rule the registry does not know (none today) keeps the severity it came with."""
    registry = load_all()
    judged: list[Finding] = []
    for finding in findings:
        registered = registry.get(finding.rule)
        if registered is None:
            judged.append(finding)
            continue
        result = judge_finding(policy, registered.id, registered.default, registered.fixed, finding)
        if result is not None:
            judged.append(capped(_pre_existing(policy, registered, result)))
    return judged


def judge_finding(policy: Policy, rule_id: str, default: RuleSetting, fixed: bool, finding: Finding) -> Finding | None:
    """The finding with the severity the policy gives it at its path: None when the rule is off there,
    ``info`` with ``details["waived_by"]`` when a waiver covers it. Errors and info pass unchanged."""
    if finding.severity in ("error", "info"):
        return finding
    setting = "block" if fixed else settings_for_path(policy, finding.path).setting(rule_id, default)
    if setting == "ignore":
        return None
    severity: Severity = "block" if setting == "block" else "warn"  # advise: the finding warns
    waiver = None if fixed else waiver_for(policy, finding)
    if waiver is None:
        return _lapsed(policy, replace(finding, severity=severity))
    details = {**finding.details, "waived_by": waiver_record(waiver), "waived_severity": severity}
    return replace(finding, severity="info", details=details)


def _lapsed(policy: Policy, finding: Finding) -> Finding:
    """The finding, saying so when an expired waiver would have covered it."""
    lapsed = expired_waiver_for(policy, finding)
    if lapsed is None:
        return finding
    details = {**finding.details, "waiver_expired": waiver_record(lapsed)}
    return replace(finding, message=f"{finding.message} ({lapsed_note(lapsed)})", details=details)


def _pre_existing(policy: Policy, registered: Rule, finding: Finding) -> Finding:
    """A failure that happens at the base revision too was not caused by the change: it warns, unless the
    rule's option ``block_pre_existing`` (set in the policy) says it blocks anyway."""
    if finding.severity != "block" or not finding.details.get("pre_existing"):
        return finding
    if "block_pre_existing" in registered.options and registered.option(policy, "block_pre_existing"):
        return finding
    return replace(finding, severity="warn", details={**finding.details, "max_severity": "warn"})


def capped(finding: Finding) -> Finding:
    """A finding that says ``details["max_severity"] = "warn"`` never blocks (e.g. a changed expected value,
    which may be a legitimate fix): the rule's setting applies up to that cap."""
    if finding.severity == "block" and finding.details.get("max_severity") == "warn":
        return replace(finding, severity="warn")
    return finding
