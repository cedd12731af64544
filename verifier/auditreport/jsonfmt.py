"""The audit as JSON: a versioned format that tools read; fields may be added, never change meaning.

FORMAT_VERSION history (one line per version):
  1: window, totals, commits (attention first), agents, people, findings and waivers by rule, expiring
     waivers, reverts, trend (oldest week first, the window last), problems.
"""

from __future__ import annotations

import json
from typing import Any

from verifier.audit import FORMAT_VERSION, Audit, AuditCommit, Group, Period


def as_dict(audit: Audit) -> dict[str, Any]:
    window = audit.window
    return {
        "format": FORMAT_VERSION,
        "tool": "verifier",
        "ref": audit.ref,
        "end": audit.end,
        "notes_ref": audit.notes_ref,
        "window": {"since": window.since, "until": window.until},
        "churn_days": audit.churn_days,
        "totals": period_dict(window),
        "attention": [c.sha for c in audit.attention],
        "commits": [commit_dict(c) for c in audit.commits],
        "agents": [group_dict(g) for g in audit.agents],
        "people": [group_dict(g) for g in audit.people],
        "findings_by_rule": [{"rule": r, "severity": s, "count": n} for r, s, n in audit.findings_by_rule],
        "waivers_by_rule": [{"rule": r, "count": n} for r, n in audit.waivers_by_rule],
        "expiring_waivers": [
            {"rule": e.waiver.rule, "path": e.waiver.path, "owner": e.waiver.owner, "reason": e.waiver.reason,
             "expires": e.waiver.expires, "days_left": e.days_left}
            for e in audit.expiring_waivers
        ],
        "reverts": [
            {"sha": r.sha, "date": r.date, "committer": r.committer, "reverted": r.reverted, "agent": r.agent}
            for r in audit.reverts
        ],
        "trend": [{"since": p.since, "until": p.until, **period_dict(p)} for p in audit.trend],
        "problems": list(audit.problems),
    }


def period_dict(period: Period) -> dict[str, Any]:
    return {
        "commits": period.commits,
        "machine_commits": period.machine_commits,
        "verified": period.verified,
        "unverified": period.unverified,
        "blocked_merged": period.blocked_merged,
        "lines_added": period.lines_added,
        "machine_lines_added": period.machine_lines_added,
        "machine_lines_alive": period.machine_lines_alive,
        "machine_lines_churned": period.machine_lines_churned,
        "machine_share": period.machine_share,
        "verified_share": period.verified_share,
        "survival": period.survival,
    }


def commit_dict(commit: AuditCommit) -> dict[str, Any]:
    return {
        "sha": commit.sha,
        "date": commit.date,
        "agent": commit.agent,
        "marked": commit.marked,
        "author": commit.author,
        "committer": commit.committer,
        "subject": commit.subject,
        "merge": commit.merge,
        "verified": commit.verified,
        "status": commit.status,
        "verdict": commit.verdict,
        "note_problem": commit.note_problem,
        "coverage_percent": commit.coverage_percent,
        "lines_added": commit.lines_added,
        "machine_lines": commit.machine_lines,
        "lines_alive": commit.lines_alive,
        "lines_churned": commit.lines_churned,
        "reverted_by": commit.reverted_by,
        "findings": [dict(f) for f in commit.findings],
        "waivers": [dict(w) for w in commit.waivers],
    }


def group_dict(group: Group) -> dict[str, Any]:
    return {
        "name": group.name, "commits": group.commits, "machine_lines": group.machine_lines,
        "lines_alive": group.lines_alive, "lines_churned": group.lines_churned, "unverified": group.unverified,
        "blocked_merged": group.blocked_merged, "reverted": group.reverted,
    }


def render(audit: Audit) -> str:
    return json.dumps(as_dict(audit), indent=2) + "\n"
