"""The mutation stage's counts as the reports show them (the same arithmetic as the rule's score)."""

from __future__ import annotations

from typing import Any

from verifier.models import Report

RULE_ID = "tests.mutant-survived"  # the rule of verifier.rules.mutation


def accepted_lines(report: Report) -> set[tuple[str, int]]:
    """The lines whose surviving mutants a waiver accepts (their findings became info with ``waived_by``)."""
    return {
        (f.path, f.line)
        for f in report.findings
        if f.rule == RULE_ID and f.path and f.line and "waived_by" in (f.details or {})
    }


def mutation_counts(report: Report) -> dict[str, Any] | None:
    """killed (timeouts and crashes included), survived, accepted, not-run, error, and the score in percent."""
    result = report.mutation
    if result is None:
        return None
    accepted = accepted_lines(report)
    survivors = [o for o in result.outcomes if o.status == "survived"]
    accepted_count = sum(1 for o in survivors if (o.mutant.path, o.mutant.line) in accepted)
    killed = sum(1 for o in result.outcomes if o.counts_as_killed)
    survived = len(survivors) - accepted_count
    judged = killed + survived
    return {
        "total": len(result.outcomes),
        "killed": killed,
        "timeout": result.count("timeout"),
        "crashed": result.count("crashed"),
        "survived": survived,
        "accepted": accepted_count,
        "not_run": result.count("not-run"),
        "error": result.count("error"),
        "cached": result.cached,
        "score": None if judged == 0 else round(100.0 * killed / judged, 2),
        "wall_seconds": result.wall_seconds,
    }
