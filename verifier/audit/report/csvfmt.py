"""The audit's commit rows as CSV (RFC 4180, as Python's csv module writes it), attention first.

``checked`` (yes: the gate has a record that judged the commit's own lines) and ``passed`` (yes: that
verdict was pass or warn) are separate columns, as is ``at_commit_time`` (checked, skipped or unknown):
see verifier.audit.model.DEFINITIONS. The ``mutants_*`` columns are empty when the commit has no mutation
data; they hold its newest check's counts of the whole checked change, and ``mutants_counted`` says whether
this row carries them into the totals (a check's counts are counted once)."""

from __future__ import annotations

import csv
import io

from verifier.audit.model import Audit, AuditCommit

COLUMNS = (
    "sha",
    "date",
    "agent",
    "marked",
    "committer",
    "author",
    "subject",
    "status",
    "verified",
    "checked",
    "passed",
    "at_commit_time",
    "checked_how",
    "verdict",
    "coverage_percent",
    "lines_added",
    "machine_lines",
    "lines_alive",
    "lines_churned",
    "findings",
    "range_findings",
    "waivers",
    "reverted_by",
    "mutants_killed",
    "mutants_survived",
    "mutants_accepted",
    "mutation_score",
    "mutants_counted",
)


def render(audit: Audit) -> str:
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(COLUMNS)
    for c in audit.commits:
        writer.writerow(
            [
                c.sha,
                c.date,
                c.agent,
                "yes" if c.marked else "no",
                c.committer,
                c.author,
                c.subject,
                c.status,
                "yes" if c.verified else "no",
                "yes" if c.checked else "no",
                "yes" if c.passed else "no",
                c.at_commit,
                c.checked_how or "",
                c.verdict or "",
                "" if c.coverage_percent is None else c.coverage_percent,
                c.lines_added,
                c.machine_lines,
                c.lines_alive,
                c.lines_churned,
                len(c.findings),
                len(c.range_findings),
                len(c.waivers),
                c.reverted_by or "",
                *_mutant_cells(c),
            ]
        )
    return out.getvalue()


def _mutant_cells(commit: AuditCommit) -> list[object]:
    counts = commit.mutants
    if counts is None:
        return ["", "", "", "", ""]
    score = "" if counts.score is None else counts.score
    return [counts.killed, counts.survived, counts.accepted, score, "yes" if commit.mutants_counted else "no"]
