"""Waivers: which of the trusted policy's owned, dated exceptions covers a finding."""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping

from verifier.models import Finding, Policy, Waiver
from verifier.pathglob import matches_any


def waiver_for(policy: Policy, finding: Finding) -> Waiver | None:
    """The first waiver that covers ``finding``; only the glob ``**`` covers a finding without a path, and
    a waiver written ``path:line`` covers the findings of that one line (an accepted equivalent mutant)."""
    for waiver in policy.waivers:
        if waiver.rule == finding.rule and _covers(waiver.path, finding):
            return waiver
    return None


def waived_by(policy: Policy) -> Callable[[Finding], dict[str, str] | None]:
    """For the rules that count waived findings apart: the record of the waiver covering a finding."""

    def lookup(finding: Finding) -> dict[str, str] | None:
        waiver = waiver_for(policy, finding)
        return None if waiver is None else waiver_record(waiver)

    return lookup


def _covers(pattern: str, finding: Finding) -> bool:
    if finding.path is None:
        return pattern == "**"
    path, _, line = pattern.rpartition(":")
    if path and line.isdigit():
        return finding.line == int(line) and finding.path == path
    return matches_any(finding.path, (pattern,))


def waiver_record(waiver: Waiver) -> dict[str, str]:
    """The waiver as a finding's ``details["waived_by"]`` holds it (and the reports show it)."""
    return {
        "rule": waiver.rule,
        "path": waiver.path,
        "reason": waiver.reason,
        "owner": waiver.owner,
        "expires": waiver.expires,
        "source": waiver.source,
    }


def waivers_used(policy: Policy, findings: Iterable[Finding]) -> tuple[Waiver, ...]:
    """The policy's waivers that covered at least one of ``findings``, in the policy's order."""
    used = {waiver.get("source") for f in findings if isinstance(waiver := f.details.get("waived_by"), Mapping)}
    return tuple(waiver for waiver in policy.waivers if waiver.source in used)
