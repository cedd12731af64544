"""The audit's plain data: commits as ``git log`` gave them, what the replay found, and what the audit concluded.

Everything here is a tuple or a frozen dataclass of plain values; the reading edge (:mod:`.history`)
makes them, the computation (:mod:`.compute`) turns them into an :class:`Audit`, the reporters
(:mod:`.report`) only format that.

Definitions (also in the reports, :data:`DEFINITIONS`): a commit is in the window when it is reachable
from the window-end revision (the newest first-parent ancestor of ``--ref`` committed before ``--until``)
and its committer date is in [since, until). A machine commit's status is read from the newest entry of
its note (:mod:`verifier.report.notes`, formats 1 and 2). It is *checked* (``verified`` in the data) when
that entry's verdict on the commit's own lines is pass, warn or block; *passed* when it is pass or warn;
*blocked-merged* when it is block. An entry with verdict error, a skipped entry, an unreadable note or no
note at all leaves the commit *unverified* (fail closed). Apart from its status, a commit was *skipped at
commit time* when no entry of its note comes from a commit hook that ran: a later range check that passed
it does not hide that. Findings are counted once: a commit's own findings on that commit, the whole
change's facts once per check.

Mutants (killed, survived, accepted by a waiver) come from the newest entry of a commit's note, like its
status. An entry's counts are the mutation stage's for the whole checked change, so they are counted once
per check: on the check's head commit when it is a machine commit of the span, else on the newest machine
commit the check covered (its agent and week get them). A commit whose newest entry has no counts (an older
note, a check without the mutation stage, a skipped or unreadable record) has *no mutation data*: it
counts apart, never as zero survivors.
"""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, NamedTuple

FORMAT_VERSION = 1
DEFAULT_NOTES_REF = "refs/notes/verifier"
DAY = 86400
DEFINITIONS = {
    "checked": "the gate has a record for the commit: the newest check of its note judged its own lines "
    "(pass, warn or block)",
    "passed": "the newest check's verdict on the commit's own lines was pass or warn",
    "unverified": "no readable gate record, a skipped check, or a check that could not verify (fail closed)",
    "blocked-merged": "on the branch although the newest check's verdict on its own lines was block",
    "skipped at commit time": "no check by the commit hook ran on it (skipped, bypassed or not installed), "
    "whatever a later check found",
    "mutants killed / survived / accepted": "from the newest check of each commit's note: faulty versions of its "
    "machine-written lines that a test caught (timeouts and crashes included), that every test let through, "
    "and survivors a waiver accepts; a check's counts cover its whole change and are counted once, on its head "
    "commit (else the newest commit it covered), in that commit's agent and week",
    "mutation score": "killed share of the killed and surviving mutants (accepted ones left out)",
    "no mutation data": "the newest check recorded no mutant counts (an older note, the stage off, skipped or "
    "unreadable): counted apart, never as zero survivors",
}
REVERT = re.compile(r"This reverts commit ([0-9a-f]{7,40})")  # the message git revert writes
AT_COMMIT = ("checked", "skipped", "unknown")  # unknown: only format-1 notes, which did not say how they ran


class FilePatch(NamedTuple):
    """One file of a commit's patch: paths (None for /dev/null) and its ``-U0`` hunks, flat: old start,
    old count, new start, new count, then the next hunk's four numbers (the cache stores them so)."""

    old_path: str | None
    new_path: str | None
    hunks: Sequence[int] = ()

    @property
    def added(self) -> int:
        return sum(self.hunks[3::4])


class LogCommit(NamedTuple):
    """A commit of the span as ``git log`` gave it; ``patches`` holds one list per parent
    (one for a root or ordinary commit, none for a merge whose patches were not read). A tuple:
    the audit makes ten thousand of them."""

    sha: str
    parents: tuple[str, ...]
    author: str
    author_email: str
    committer: str
    committer_email: str
    time: int  # committer date, seconds since the epoch
    message: str
    patches: tuple[tuple[FilePatch, ...], ...] = ()
    note: str | None = None  # the text of its note under the audited notes ref

    @property
    def subject(self) -> str:
        return self.message.split("\n", 1)[0]


@dataclass(frozen=True)
class WaiverInfo:
    """A waiver of the trusted policy at the window's end."""

    rule: str
    path: str
    reason: str
    owner: str
    expires: str


@dataclass(frozen=True)
class History:
    """Everything the audit reads from git, in plain values."""

    ref: str
    since: int  # window start (epoch seconds, inclusive)
    until: int  # window end (exclusive)
    span_since: int  # start of the earliest trend week
    end: str | None  # the window-end revision; None when the branch had no commit before ``until``
    commits: tuple[LogCommit, ...]  # the span, parents before children
    notes: Mapping[str, Mapping[str, Any]]  # commit sha -> note body (see verifier.report.notes)
    outside: Mapping[str, LogCommit] = field(default_factory=dict)  # reverted commits older than the span
    waivers: tuple[WaiverInfo, ...] = ()
    agent_emails: tuple[str, ...] = ()
    problems: tuple[str, ...] = ()  # facts the reader must see (e.g. the policy could not be read)
    lines: Mapping[str, CommitLines] | None = None  # from the cache; None: replay the patches
    lines_key: str = ""  # what the line facts depend on: window-end revision, span, agent identities


class CommitLines(NamedTuple):
    """What the replay found for one commit of the span (a list in the cache)."""

    lines_added: int
    agent: str | None = None  # None: a person's commit
    scope: Sequence[str] = ()
    marked: bool = False
    machine_lines: int = 0
    alive: int = 0  # machine lines alive at the window's end
    lifetimes: Sequence[int] = ()  # seconds each machine line lived (dead at the window's end), ascending


@dataclass(frozen=True)
class Settings:
    """How to audit."""

    weeks: int = 4  # trend weeks before the window
    churn_days: int = 14  # a machine line removed within this many days of being written is churn
    expiry_days: int = 14  # waivers expiring within this many days after the window are listed


@dataclass(frozen=True)
class MutantCounts:
    """The mutation stage's counts, as one check recorded them or summed over checks."""

    killed: int = 0  # timeouts and crashes included
    survived: int = 0  # not accepted by a waiver
    accepted: int = 0  # survivors a waiver accepts
    checks: int = 1  # how many checks' counts these are

    @property
    def score(self) -> float | None:
        """Killed share of the killed and surviving mutants (the stage's own arithmetic), None when none."""
        judged = self.killed + self.survived
        return None if not judged else round(100.0 * self.killed / judged, 2)

    def __add__(self, other: MutantCounts) -> MutantCounts:
        return MutantCounts(
            self.killed + other.killed,
            self.survived + other.survived,
            self.accepted + other.accepted,
            self.checks + other.checks,
        )


@dataclass(frozen=True)
class AuditCommit:
    """One machine-written commit of the window."""

    sha: str
    date: str  # ISO-8601 UTC, committer date
    agent: str
    marked: bool  # True: a Model-Written trailer; False: matched by the policy's agent identities
    author: str
    committer: str
    subject: str
    merge: bool
    lines_added: int  # every added line of the commit (git log --numstat's count; 0 for a merge)
    machine_lines: int  # added lines in the mark's scope
    lines_alive: int  # of those, alive at the window's end
    lines_churned: int  # of those, removed within churn_days
    verified: bool  # checked: the newest check judged its own lines (see DEFINITIONS)
    status: str  # unverified | blocked-merged | pass | warn
    verdict: str | None
    coverage_percent: float | None
    findings: tuple[Mapping[str, Any], ...]  # the newest check's findings on the commit's own lines
    waivers: tuple[Mapping[str, Any], ...]
    note_problem: str | None = None
    reverted_by: str | None = None
    at_commit: str = "skipped"  # one of AT_COMMIT
    checks: int = 0  # entries in its note
    checked_how: str | None = None  # how the newest check ran (verifier.report.notes.HOW)
    range_findings: tuple[Mapping[str, Any], ...] = ()  # the newest check's facts of the whole change
    check_key: tuple[str, ...] = ()  # which check the newest entry was (range and time): counts its facts once
    mutants: MutantCounts | None = None  # the newest check's counts (its whole change); None: no mutation data
    mutants_counted: bool = False  # True: this commit carries its check's counts into the totals

    @property
    def checked(self) -> bool:
        return self.verified

    @property
    def passed(self) -> bool:
        return self.verified and self.verdict in ("pass", "warn")


@dataclass(frozen=True)
class Period:
    """The figures of one stretch of time (the window, or one trend week)."""

    since: str
    until: str
    commits: int
    machine_commits: int
    lines_added: int
    machine_lines_added: int
    machine_lines_alive: int  # alive at the window's end
    machine_lines_churned: int
    verified: int  # checked
    unverified: int
    blocked_merged: int
    passed: int = 0
    skipped_at_commit: int = 0
    mutants: MutantCounts | None = None  # summed once per check; None: no machine commit with mutation data
    mutation_no_data: int = 0  # machine commits without mutation data

    @property
    def machine_share(self) -> float | None:
        return None if not self.lines_added else round(100.0 * self.machine_lines_added / self.lines_added, 2)

    @property
    def verified_share(self) -> float | None:
        return None if not self.machine_commits else round(100.0 * self.verified / self.machine_commits, 2)

    @property
    def survival(self) -> float | None:
        added = self.machine_lines_added
        return None if not added else round(100.0 * self.machine_lines_alive / added, 2)


@dataclass(frozen=True)
class Group:
    """Figures of one agent or one person."""

    name: str
    commits: int
    machine_lines: int
    lines_alive: int
    lines_churned: int
    unverified: int
    blocked_merged: int
    reverted: int


@dataclass(frozen=True)
class AgentWeek:
    """The mutants of one agent's commits in one trend week (or the window, the last one)."""

    agent: str
    since: str
    until: str
    commits: int
    with_data: int  # commits whose newest check recorded mutant counts
    mutants: MutantCounts | None  # counted once per check (see DEFINITIONS); None: no commit with data

    @property
    def no_data(self) -> int:
        return self.commits - self.with_data


@dataclass(frozen=True)
class Revert:
    """A commit of the window that reverts a machine-written commit."""

    sha: str
    date: str
    committer: str
    reverted: str
    agent: str


@dataclass(frozen=True)
class ExpiringWaiver:
    waiver: WaiverInfo
    days_left: int  # from the window's end; negative: already expired then


@dataclass(frozen=True)
class Audit:
    """Everything the audit concluded; the reporters only format this."""

    ref: str
    end: str | None
    window: Period
    churn_days: int
    commits: tuple[AuditCommit, ...]  # unverified first, then blocked-merged, then the rest, newest first
    agents: tuple[Group, ...]
    people: tuple[Group, ...]
    findings_by_rule: tuple[tuple[str, str, int], ...]  # (rule, severity, count), most first
    waivers_by_rule: tuple[tuple[str, int], ...]
    expiring_waivers: tuple[ExpiringWaiver, ...]
    reverts: tuple[Revert, ...]
    trend: tuple[Period, ...]  # oldest first; the last one is the window
    problems: tuple[str, ...] = ()
    notes_ref: str = DEFAULT_NOTES_REF
    mutation: tuple[AgentWeek, ...] = ()  # per trend week (oldest first, the window last), then per agent

    @property
    def attention(self) -> tuple[AuditCommit, ...]:
        return tuple(c for c in self.commits if c.status in ("unverified", "blocked-merged"))
