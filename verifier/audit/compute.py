"""The audit's computation: plain data in (a :class:`~verifier.audit.model.History`), an :class:`Audit` out.

No git and no files here: :mod:`.history` read everything, :mod:`.replay` found the lines' fates.
"""

from __future__ import annotations

import bisect
from collections import Counter, defaultdict
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import replace
from datetime import date, datetime, timezone
from typing import Any

from verifier.audit.authorship import authorship
from verifier.audit.model import (
    DAY,
    REVERT,
    AgentWeek,
    Audit,
    AuditCommit,
    CommitLines,
    ExpiringWaiver,
    Group,
    History,
    LogCommit,
    MutantCounts,
    Period,
    Revert,
    Settings,
    WaiverInfo,
)
from verifier.audit.replay import line_facts
from verifier.audit.window import iso, parse_iso
from verifier.report.notes import NoteRecord, latest_check, read_record

VERIFIED_VERDICTS = ("pass", "warn", "block")


def compute_audit(history: History, settings: Settings | None = None) -> Audit:
    """The audit of ``history``: plain data in, plain data out."""
    settings = settings or Settings()
    facts = (
        history.lines if history.lines is not None else line_facts(history.commits, history.agent_emails, history.end)
    )
    reverts, reverted_by = _reverts(history, facts)
    rows = _count_mutants_once(
        {
            c.sha: _row(c, facts[c.sha], history.notes.get(c.sha), settings.churn_days, reverted_by.get(c.sha))
            for c in history.commits
            if facts[c.sha].agent is not None
        }
    )
    in_window = [c for c in history.commits if c.time >= history.since]
    window_rows = [rows[c.sha] for c in in_window if c.sha in rows]
    ordered = sorted(window_rows, key=lambda r: r.date, reverse=True)
    ordered.sort(key=lambda r: {"unverified": 0, "blocked-merged": 1}.get(r.status, 2))
    window = _period(history.since, history.until, in_window, rows, facts)
    trend = _trend(history, rows, facts, settings.weeks, window)
    return Audit(
        ref=history.ref,
        end=history.end,
        window=window,
        churn_days=settings.churn_days,
        commits=tuple(ordered),
        agents=_groups(window_rows, lambda r: r.agent),
        people=_groups(window_rows, lambda r: r.committer),
        findings_by_rule=_finding_counts(window_rows),
        waivers_by_rule=_waiver_counts(window_rows),
        expiring_waivers=_expiring(history.waivers, history.until, settings.expiry_days),
        reverts=tuple(r for r in reverts if parse_iso(r.date) >= history.since),
        trend=trend,
        problems=history.problems,
        mutation=_agent_weeks(history, rows, trend),
    )


def _reverts(history: History, facts: Mapping[str, CommitLines]) -> tuple[list[Revert], dict[str, str]]:
    by_prefix = {c.sha: c for c in history.commits} | dict(history.outside)
    reverts: list[Revert] = []
    reverted_by: dict[str, str] = {}
    for commit in history.commits:
        for name in REVERT.findall(commit.message):
            target = next((sha for sha in by_prefix if sha.startswith(name)), None)
            if target is None:
                continue
            agent = facts[target].agent if target in facts else None
            if target not in facts and (found := authorship(by_prefix[target], history.agent_emails)):
                agent = found.agent
            if agent is None:
                continue
            reverts.append(Revert(commit.sha, iso(commit.time), _person(commit), target, agent))
            reverted_by.setdefault(target, commit.sha)
    return reverts, reverted_by


def _person(commit: LogCommit) -> str:
    return f"{commit.committer} <{commit.committer_email}>"


def _row(
    commit: LogCommit, lines: CommitLines, note: Mapping[str, Any] | None, churn_days: int, reverted_by: str | None
) -> AuditCommit:
    record = read_record(note)
    newest = record.newest if record else None
    verified = newest is not None and not newest.skipped and newest.verdict in VERIFIED_VERDICTS
    verdict = newest.verdict if newest else None
    status = "unverified" if not verified else "blocked-merged" if verdict == "block" else str(verdict)
    return AuditCommit(
        sha=commit.sha,
        date=iso(commit.time),
        agent=str(lines.agent),
        marked=bool(lines.marked),
        author=f"{commit.author} <{commit.author_email}>",
        committer=_person(commit),
        subject=commit.subject,
        merge=len(commit.parents) > 1,
        lines_added=lines.lines_added,
        machine_lines=lines.machine_lines,
        lines_alive=lines.alive,
        lines_churned=bisect.bisect_right(lines.lifetimes, churn_days * DAY),
        verified=verified,
        status=status,
        verdict=verdict,
        coverage_percent=newest.coverage_percent if newest else None,
        findings=newest.findings if newest else (),
        waivers=newest.waivers if newest else (),
        note_problem=_problem(record),
        reverted_by=reverted_by,
        at_commit=_at_commit(record),
        checks=len(record.checks) if record else 0,
        checked_how=newest.how if newest else None,
        range_findings=newest.range_findings if newest else (),
        check_key=(str(newest.range_base), str(newest.range_head), newest.checked_at) if newest else (),
        mutants=_mutants_of(note),
    )


def _mutants_of(note: Mapping[str, Any] | None) -> MutantCounts | None:
    """The newest entry's mutant counts (verifier.report.notes: ``mutants``); None when it has none or
    they are not counts: an older note, a check without the mutation stage, a skipped entry."""
    newest = latest_check(note) if note is not None else None
    counts = newest.get("mutants") if newest is not None and newest.get("skipped") is not True else None
    if not isinstance(counts, Mapping):
        return None
    values = [counts.get(key) for key in ("killed", "survived", "accepted")]
    numbers = [v for v in values if type(v) is int and v >= 0]  # bool is not a count
    if len(numbers) != len(values):
        return None
    killed, survived, accepted = numbers
    return MutantCounts(killed, survived, accepted)


def _count_mutants_once(rows: Mapping[str, AuditCommit]) -> dict[str, AuditCommit]:
    """Mark, for each check with mutant counts, the one row that carries them into the totals: the
    check's head commit when it is a row, else the newest row the check covered (every commit of a
    checked range holds a copy of the whole change's counts)."""
    by_check: dict[tuple[str, ...], list[AuditCommit]] = defaultdict(list)
    for row in rows.values():
        if row.mutants is not None:
            by_check[row.check_key].append(row)
    carriers = set()
    for key, covered in by_check.items():
        head = next((r for r in covered if r.sha == key[1]), None)
        carriers.add((head or max(covered, key=lambda r: (r.date, r.sha))).sha)
    return {sha: replace(row, mutants_counted=True) if sha in carriers else row for sha, row in rows.items()}


def _summed_mutants(rows: Iterable[AuditCommit]) -> MutantCounts | None:
    """The carried counts of ``rows`` summed; None when no row has mutation data."""
    with_data = [r for r in rows if r.mutants is not None]
    if not with_data:
        return None
    return sum((r.mutants for r in with_data if r.mutants and r.mutants_counted), MutantCounts(checks=0))


def _agent_weeks(history: History, rows: Mapping[str, AuditCommit], trend: Sequence[Period]) -> tuple[AgentWeek, ...]:
    """Per trend week (the window last) and per agent: the commits, those with mutation data, the counts."""
    found = []
    for period in trend:
        start, stop = parse_iso(period.since), parse_iso(period.until)
        grouped: dict[str, list[AuditCommit]] = defaultdict(list)
        for commit in history.commits:
            if start <= commit.time < stop and commit.sha in rows:
                grouped[rows[commit.sha].agent].append(rows[commit.sha])
        for agent, mine in sorted(grouped.items()):
            with_data = sum(1 for r in mine if r.mutants is not None)
            found.append(AgentWeek(agent, period.since, period.until, len(mine), with_data, _summed_mutants(mine)))
    return tuple(found)


def _problem(record: NoteRecord | None) -> str | None:
    if record is None:
        return "no note: the gate was skipped or never ran"
    if record.problem is not None:
        return record.problem
    newest = record.newest
    if newest is not None and newest.skipped:
        return f"the newest check ({newest.how}) was skipped"
    return None


def _at_commit(record: NoteRecord | None) -> str:
    """Whether the commit hook checked the commit: any entry of it that ran (the newest may be later)."""
    checks = record.checks if record else ()
    if any(c.how == "commit-hook" and not c.skipped for c in checks):
        return "checked"
    if checks and all(c.how == "unknown" for c in checks):
        return "unknown"
    return "skipped"


def _period(
    since: int,
    until: int,
    commits: Sequence[LogCommit],
    rows: Mapping[str, AuditCommit],
    facts: Mapping[str, CommitLines],
) -> Period:
    mine = [rows[c.sha] for c in commits if c.sha in rows]
    return Period(
        since=iso(since),
        until=iso(until),
        commits=len(commits),
        machine_commits=len(mine),
        lines_added=sum(facts[c.sha].lines_added for c in commits),
        machine_lines_added=sum(r.machine_lines for r in mine),
        machine_lines_alive=sum(r.lines_alive for r in mine),
        machine_lines_churned=sum(r.lines_churned for r in mine),
        verified=sum(1 for r in mine if r.verified),
        unverified=sum(1 for r in mine if r.status == "unverified"),
        blocked_merged=sum(1 for r in mine if r.status == "blocked-merged"),
        passed=sum(1 for r in mine if r.passed),
        skipped_at_commit=sum(1 for r in mine if r.at_commit == "skipped"),
        mutants=_summed_mutants(mine),
        mutation_no_data=sum(1 for r in mine if r.mutants is None),
    )


def _trend(
    history: History, rows: Mapping[str, AuditCommit], facts: Mapping[str, CommitLines], weeks: int, window: Period
) -> tuple[Period, ...]:
    periods = []
    for week in range(weeks, 0, -1):
        start, stop = history.since - 7 * DAY * week, history.since - 7 * DAY * (week - 1)
        periods.append(_period(start, stop, [c for c in history.commits if start <= c.time < stop], rows, facts))
    periods.append(window)
    return tuple(periods)


def _groups(rows: Sequence[AuditCommit], key: Any) -> tuple[Group, ...]:
    grouped: dict[str, list[AuditCommit]] = defaultdict(list)
    for row in rows:
        grouped[key(row)].append(row)
    groups = [
        Group(
            name,
            len(mine),
            sum(r.machine_lines for r in mine),
            sum(r.lines_alive for r in mine),
            sum(r.lines_churned for r in mine),
            sum(1 for r in mine if r.status == "unverified"),
            sum(1 for r in mine if r.status == "blocked-merged"),
            sum(1 for r in mine if r.reverted_by),
        )
        for name, mine in grouped.items()
    ]
    return tuple(sorted(groups, key=lambda g: (-g.machine_lines, g.name)))


def _once_per_check(rows: Sequence[AuditCommit]) -> list[Mapping[str, Any]]:
    """The whole-change facts of the rows' newest checks, each check's once (every commit of a checked
    range holds a copy)."""
    seen: set[tuple[str, ...]] = set()
    facts = []
    for row in rows:
        for fact in row.range_findings:
            identity = (*row.check_key, *(str(fact.get(k)) for k in ("rule", "severity", "path", "line", "message")))
            if identity not in seen:
                seen.add(identity)
                facts.append(fact)
    return facts


def _finding_counts(rows: Sequence[AuditCommit]) -> tuple[tuple[str, str, int], ...]:
    """Findings by rule and severity, each counted once: a commit's own on that commit, a range's once."""
    findings = [f for r in rows for f in r.findings] + _once_per_check(rows)
    counts = Counter((str(f.get("rule")), str(f.get("severity"))) for f in findings)
    return tuple((rule, severity, n) for (rule, severity), n in sorted(counts.items(), key=lambda kv: (-kv[1], kv[0])))


def _waiver_counts(rows: Sequence[AuditCommit]) -> tuple[tuple[str, int], ...]:
    """Waivers used, by rule: once per check (a waiver a check used appears on each commit it covered)."""
    used = {
        (*r.check_key, *(str(w.get(k)) for k in ("rule", "path", "reason"))): str(w.get("rule"))
        for r in rows
        for w in r.waivers
    }
    return tuple(Counter(used.values()).most_common())


def _expiring(waivers: Sequence[WaiverInfo], until: int, days: int) -> tuple[ExpiringWaiver, ...]:
    last_day = datetime.fromtimestamp(until - 1, timezone.utc).date()
    found = []
    for waiver in waivers:
        try:
            left = (date.fromisoformat(waiver.expires) - last_day).days
        except ValueError:
            continue
        if left <= days:
            found.append(ExpiringWaiver(waiver, left))
    return tuple(sorted(found, key=lambda e: e.days_left))
