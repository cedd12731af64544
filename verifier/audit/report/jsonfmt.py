"""The audit as JSON: a versioned format that tools read; fields may be added, never change meaning.

FORMAT_VERSION history (one line per version):
  1: window, totals, commits (attention first), agents, people, findings and waivers by rule, expiring
     waivers, reverts, trend (oldest week first, the window last), problems. Added since, same version:
     definitions (the words of the statuses), totals' checked (= verified), passed and
     skipped_at_commit_time, commits' checked, passed, at_commit_time, checks, checked_how and
     range_findings (findings then hold only the commit's own); mutation (per trend week and agent:
     commits, with_data, no_data, mutants), totals' and trend weeks' mutants and mutation_no_data,
     commits' mutants (null: no mutation data; ``counted``: this commit carries its check's counts).
"""

from __future__ import annotations

import json
from typing import Any

from verifier.audit.model import DEFINITIONS, FORMAT_VERSION, Audit, AuditCommit, Group, MutantCounts, Period


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
        "definitions": dict(DEFINITIONS),
        "totals": period_dict(window),
        "attention": [c.sha for c in audit.attention],
        "commits": [commit_dict(c) for c in audit.commits],
        "agents": [group_dict(g) for g in audit.agents],
        "people": [group_dict(g) for g in audit.people],
        "findings_by_rule": [{"rule": r, "severity": s, "count": n} for r, s, n in audit.findings_by_rule],
        "waivers_by_rule": [{"rule": r, "count": n} for r, n in audit.waivers_by_rule],
        "expiring_waivers": [
            {
                "rule": e.waiver.rule,
                "path": e.waiver.path,
                "owner": e.waiver.owner,
                "reason": e.waiver.reason,
                "expires": e.waiver.expires,
                "days_left": e.days_left,
            }
            for e in audit.expiring_waivers
        ],
        "reverts": [
            {"sha": r.sha, "date": r.date, "committer": r.committer, "reverted": r.reverted, "agent": r.agent}
            for r in audit.reverts
        ],
        "trend": [{"since": p.since, "until": p.until, **period_dict(p)} for p in audit.trend],
        "mutation": [
            {
                "since": w.since,
                "until": w.until,
                "agent": w.agent,
                "commits": w.commits,
                "with_data": w.with_data,
                "no_data": w.no_data,
                "mutants": mutants_dict(w.mutants),
            }
            for w in audit.mutation
        ],
        "problems": list(audit.problems),
    }


def period_dict(period: Period) -> dict[str, Any]:
    return {
        "commits": period.commits,
        "machine_commits": period.machine_commits,
        "verified": period.verified,
        "checked": period.verified,
        "passed": period.passed,
        "skipped_at_commit_time": period.skipped_at_commit,
        "unverified": period.unverified,
        "blocked_merged": period.blocked_merged,
        "lines_added": period.lines_added,
        "machine_lines_added": period.machine_lines_added,
        "machine_lines_alive": period.machine_lines_alive,
        "machine_lines_churned": period.machine_lines_churned,
        "machine_share": period.machine_share,
        "verified_share": period.verified_share,
        "survival": period.survival,
        "mutants": mutants_dict(period.mutants),
        "mutation_no_data": period.mutation_no_data,
    }


def mutants_dict(counts: MutantCounts | None) -> dict[str, Any] | None:
    """Killed, survived, accepted, score and how many checks' counts; None: no mutation data."""
    if counts is None:
        return None
    return {
        "killed": counts.killed,
        "survived": counts.survived,
        "accepted": counts.accepted,
        "score": counts.score,
        "checks": counts.checks,
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
        "checked": commit.checked,
        "passed": commit.passed,
        "at_commit_time": commit.at_commit,
        "checks": commit.checks,
        "checked_how": commit.checked_how,
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
        "range_findings": [dict(f) for f in commit.range_findings],
        "waivers": [dict(w) for w in commit.waivers],
        "mutants": None
        if commit.mutants is None
        else {**(mutants_dict(commit.mutants) or {}), "counted": commit.mutants_counted},
    }


def group_dict(group: Group) -> dict[str, Any]:
    return {
        "name": group.name,
        "commits": group.commits,
        "machine_lines": group.machine_lines,
        "lines_alive": group.lines_alive,
        "lines_churned": group.lines_churned,
        "unverified": group.unverified,
        "blocked_merged": group.blocked_merged,
        "reverted": group.reverted,
    }


def render(audit: Audit) -> str:
    return indented(as_dict(audit)) + "\n"


def indented(value: Any, margin: str = "\n") -> str:
    """The text of ``json.dumps(value, indent=2)``, made faster: with an indent the json module drops its
    C encoder for a pure-Python one, which costs a lot on a large window; here each string is encoded by
    the json module's own C function, each key once, and only the layout is Python. tests/test_audit.py
    checks the two texts are the same."""
    kind = type(value)
    if kind is dict:
        if not value:
            return "{}"
        inner = margin + "  "
        keys = _KEYS
        parts = [
            (keys.get(k) or _key(k)) + (_LEAVES[type(v)](v) if type(v) in _LEAVES else indented(v, inner))
            for k, v in value.items()
        ]
        return "{" + inner + ("," + inner).join(parts) + margin + "}"
    if kind is list or kind is tuple:
        if not value:
            return "[]"
        inner = margin + "  "
        parts = [_LEAVES[type(v)](v) if type(v) in _LEAVES else indented(v, inner) for v in value]
        return "[" + inner + ("," + inner).join(parts) + margin + "]"
    if kind in _LEAVES:
        return _LEAVES[kind](value)
    return json.dumps(value)  # floats (NaN and the infinities as json writes them), anything else as json would


_string = json.encoder.encode_basestring_ascii
_LEAVES = {  # the exact types json.dumps writes without a choice to make
    str: _string,
    int: int.__repr__,
    bool: lambda flag: "true" if flag else "false",
    type(None): lambda _none: "null",
}
_KEYS: dict[Any, str] = {}


def _key(key: Any) -> str:
    """A dict key and its separator; json writes a key that is not a string as the text of its value."""
    text = _string(key if isinstance(key, str) else json.dumps(key)) + ": "
    if type(key) is str and len(_KEYS) < 4096:  # the report's own keys, and a few from notes
        _KEYS[key] = text
    return text
