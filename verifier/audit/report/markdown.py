"""The audit as a Markdown summary for a weekly post: headline figures, what needs attention, the groups."""

from __future__ import annotations

from verifier.audit.model import DEFINITIONS, Audit, Group, MutantCounts
from verifier.audit.report.numbers import count, percent
from verifier.words import counted


def render(audit: Audit) -> str:
    w = audit.window
    lines = [
        f"# Machine-written code on {audit.ref}: {w.since[:10]} to {w.until[:10]}",
        "",
        f"- {w.machine_commits} of {counted(w.commits, 'commit')} machine-written; {w.machine_lines_added} of "
        f"{w.lines_added} added lines ({percent(w.machine_share)})",
        f"- checked by the gate: {w.verified} of {w.machine_commits} ({percent(w.verified_share)}); passed: "
        f"{w.passed} of {w.machine_commits}; **{w.unverified} unverified**, **{w.blocked_merged} merged although "
        f"blocked**; {w.skipped_at_commit} skipped at commit time",
        f"- alive at the window's end: {w.machine_lines_alive} of {w.machine_lines_added} machine lines "
        f"({percent(w.survival)}); {w.machine_lines_churned} rewritten within {audit.churn_days} days; "
        f"{counted(len(audit.reverts), 'revert')} of machine commits",
        f"- mutants: {_mutant_summary(w.mutants)}; "
        f"{counted(w.mutation_no_data, 'machine commit')} without mutation data",
        "",
    ]
    lines += [f"> {problem}" for problem in audit.problems] + ([""] if audit.problems else [])
    lines += _attention(audit)
    lines += _groups("By agent", audit.agents) + _groups("By person (committer)", audit.people)
    lines += _counts(audit)
    lines += _trend(audit)
    lines += _mutation(audit)
    lines += _definitions()
    return "\n".join(lines).rstrip() + "\n"


def _definitions() -> list[str]:
    return ["## What the words mean", "", *(f"- **{word}**: {meaning}" for word, meaning in DEFINITIONS.items()), ""]


def _cell(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ")


def _attention(audit: Audit) -> list[str]:
    skipped = [c for c in audit.commits if c.at_commit == "skipped" and c not in audit.attention]
    if not audit.attention:
        later = f" ({len(skipped)} skipped at commit time, checked later)" if skipped else ""
        return ["## Needs attention", "", f"Nothing: every machine commit was checked and none was blocked{later}.", ""]
    rows = [
        "## Needs attention",
        "",
        "| commit | status | passed | at commit time | agent | committer | subject |",
        "|---|---|---|---|---|---|---|",
    ]
    rows += [
        f"| `{c.sha[:12]}` | {c.status} | {'yes' if c.passed else 'no'} | {c.at_commit} | {_cell(c.agent)} | "
        f"{_cell(c.committer)} | {_cell(c.subject)} |"
        for c in audit.attention
    ]
    if skipped:
        rows += [
            "",
            "Skipped at commit time, checked later: " + ", ".join(f"`{c.sha[:12]}` ({c.status})" for c in skipped),
        ]
    return [*rows, ""]


def _groups(title: str, groups: tuple[Group, ...]) -> list[str]:
    if not groups:
        return []
    rows = [
        f"## {title}",
        "",
        "| name | commits | machine lines | alive | churned | unverified | blocked-merged |",
        "|---|---:|---:|---:|---:|---:|---:|",
    ]
    rows += [
        f"| {_cell(g.name)} | {g.commits} | {g.machine_lines} | {g.lines_alive} | {g.lines_churned} | "
        f"{g.unverified} | {g.blocked_merged} |"
        for g in groups
    ]
    return [*rows, ""]


def _counts(audit: Audit) -> list[str]:
    rows: list[str] = []
    if audit.findings_by_rule:
        rows += ["## Findings by rule", "", "| rule | severity | count |", "|---|---|---:|"]
        rows += [f"| {rule} | {severity} | {count} |" for rule, severity, count in audit.findings_by_rule] + [""]
    if audit.waivers_by_rule:
        rows += ["## Waivers used", "", "| rule | count |", "|---|---:|"]
        rows += [f"| {rule} | {count} |" for rule, count in audit.waivers_by_rule] + [""]
    if audit.expiring_waivers:
        rows += [
            "## Waivers expiring soon",
            "",
            "| rule | path | owner | expires | days left |",
            "|---|---|---|---|---:|",
        ]
        rows += [
            f"| {e.waiver.rule} | {_cell(e.waiver.path)} | {_cell(e.waiver.owner)} | {e.waiver.expires} | "
            f"{e.days_left} |"
            for e in audit.expiring_waivers
        ] + [""]
    if audit.reverts:
        rows += ["## Reverts of machine commits", "", "| revert | reverted | agent | by |", "|---|---|---|---|"]
        rows += [
            f"| `{r.sha[:12]}` | `{r.reverted[:12]}` | {_cell(r.agent)} | {_cell(r.committer)} |" for r in audit.reverts
        ] + [""]
    return rows


def _trend(audit: Audit) -> list[str]:
    rows = [
        "## Trend",
        "",
        "| week from | machine commits | machine share | checked share | unverified | alive |",
        "|---|---:|---:|---:|---:|---:|",
    ]
    rows += [
        f"| {p.since[:10]} | {p.machine_commits} | {percent(p.machine_share)} | {percent(p.verified_share)} | "
        f"{p.unverified} | {percent(p.survival)} |"
        for p in audit.trend
    ]
    return [*rows, ""]


def _mutant_summary(counts: MutantCounts | None) -> str:
    if counts is None:
        return "no mutation data"
    return (
        f"{counts.killed} killed, {counts.survived} survived, {counts.accepted} accepted by a waiver "
        f"(score {percent(counts.score)})"
    )


def _mutation(audit: Audit) -> list[str]:
    if not audit.mutation:
        return []
    rows = [
        "## Mutants by agent and week",
        "",
        "| week from | agent | commits | without data | killed | survived | accepted | score |",
        "|---|---|---:|---:|---:|---:|---:|---:|",
    ]
    for w in audit.mutation:
        m = w.mutants
        cells = [m.killed, m.survived, m.accepted] if m is not None else [None, None, None]
        rows.append(
            f"| {w.since[:10]} | {_cell(w.agent)} | {w.commits} | {w.no_data} | "
            + " | ".join(count(n) for n in cells)
            + f" | {percent(m.score if m else None)} |"
        )
    return [*rows, ""]
