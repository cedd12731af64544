"""Waivers: which of the trusted policy's owned, dated exceptions covers a finding."""

from __future__ import annotations

from collections.abc import Iterable, Mapping

from verifier.models import Finding, Policy, Waiver
from verifier.pathglob import matches_any


def waiver_for(policy: Policy, finding: Finding) -> Waiver | None:
    """The first waiver that covers ``finding``; only the glob ``**`` covers a finding without a path."""
    for waiver in policy.waivers:
        if waiver.rule != finding.rule:
            continue
        if finding.path is None and waiver.path == "**":
            return waiver
        if finding.path is not None and matches_any(finding.path, (waiver.path,)):
            return waiver
    return None


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
