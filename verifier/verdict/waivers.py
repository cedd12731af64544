"""Waivers: which of the trusted policy's owned, dated exceptions covers a finding, which expired waiver
would have covered it (its finding counts again, saying so), and the notes about waivers past or near
their date."""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from datetime import date

from verifier.models import Finding, Policy, Waiver
from verifier.pathglob import matches_any


def waiver_for(policy: Policy, finding: Finding) -> Waiver | None:
    """The first waiver that covers ``finding``; only the glob ``**`` covers a finding without a path, and
    a waiver written ``path:line`` covers the findings of that one line (an accepted equivalent mutant)."""
    for waiver in policy.waivers:
        if waiver.rule == finding.rule and _covers(waiver.path, finding):
            return waiver
    return None


def expired_waiver_for(policy: Policy, finding: Finding) -> Waiver | None:
    """The first expired waiver that would have covered ``finding``: the finding is judged as any other,
    and says that its waiver has lapsed."""
    for waiver in policy.expired_waivers:
        if waiver.rule == finding.rule and _covers(waiver.path, finding):
            return waiver
    return None


def lapsed_note(waiver: Waiver) -> str:
    """What a finding an expired waiver no longer covers adds to its message."""
    return f"its waiver expired on {waiver.expires} ({waiver.source}); renew it with a later date or remove it"


def waiver_notes(policy: Policy, today: date | None = None) -> tuple[str, ...]:
    """One note per waiver past its date and per waiver expiring soon, naming its rule, path and date."""
    expired = [
        f"the waiver of {w.rule} for '{w.path}' (owner {w.owner}, {w.source}) expired on {w.expires}: "
        "findings there count again; renew it with a later date or remove it"
        for w in policy.expired_waivers
    ]
    expiring = [
        f"the waiver of {w.rule} for '{w.path}' (owner {w.owner}, {w.source}) expires on {w.expires}"
        f"{_days_left(w, today)}: renew it or fix what it covers before then"
        for w in policy.expiring_waivers
    ]
    return (*expired, *expiring)


def _days_left(waiver: Waiver, today: date | None) -> str:
    if today is None:
        return ""
    left = (date.fromisoformat(waiver.expires) - today).days
    if left == 0:
        return " (its last day is today)"
    return f" (in {left} day{'' if left == 1 else 's'})"


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
