"""The weekly audit: what the assistants committed in a window, what the gate verified, what got through.

Two halves. :func:`read_history` is the edge: a few bulk git calls (one ``git log`` of the window and
the trend weeks before it with their notes, ``git diff-tree --stdin`` for the patches not yet cached,
the trusted policy at the window's end). :func:`compute_audit` is plain data in, plain data out.

The cache (``<git common dir>/verifier/audit-cache``, safe to delete; marshal files of plain lists,
each checked by the sha-1 of its body) holds only what a sha fixes: patches by commit; a span's commits
and the replay's results by window-end revision, span and agent identities; the policy's waivers by
window-end revision, day and the shipped default (not with an organisation policy); the span's notes
by the notes ref's tip commit. A second audit of the same window therefore runs no ``git log`` and
reads no patch: a few ``rev-parse`` calls, and the notes again (``git notes list`` and one
``cat-file --batch``) only when their ref has moved. Every key also holds a hash of this module and the
trailer parser, so a changed verifier computes afresh.

Survival is found by replaying the window's patches (``-U0`` hunks) commit by commit in topological
order, each machine-written line carrying its own id: the lines alive in the window-end revision are
those ``git blame`` of that revision gives to the window's machine commits (tests/test_audit.py checks
the two agree), and the replay also knows when each line died, which gives churn. A merge takes each
line from the first parent that has it unchanged, as blame does. One pass over the patches replaces a
blame per file, which walks the whole history each time.

Definitions (also in the report): a commit is in the window when it is reachable from the window-end
revision (the newest first-parent ancestor of ``--ref`` committed before ``--until``) and its committer
date is in [since, until). A machine commit is *verified* when it has a readable format-1 note whose
verdict is pass, warn or block; *blocked-merged* when that verdict is block. A note with verdict error,
an unreadable note or no note at all leaves the commit *unverified* (fail closed).
"""

from __future__ import annotations

import bisect
import codecs
import contextlib
import functools
import gc
import hashlib
import json
import marshal
import os
import re
import sys
import time
from collections import Counter, defaultdict
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import date, datetime, timedelta, timezone
from pathlib import Path
from typing import Any, NamedTuple

from verifier.errors import UsageError, VerifierError
from verifier.gitio import Git

FORMAT_VERSION = 1
DEFAULT_NOTES_REF = "refs/notes/verifier"
DAY = 86400
VERIFIED_VERDICTS = ("pass", "warn", "block")
UNTRACKED = 0  # a line written before the span or by a person: no identity needed
PLACEHOLDER = -1  # a merge's line not yet matched to a parent

_CONFIG = ("-c", "core.quotePath=false", "-c", "diff.noprefix=false", "-c", "diff.mnemonicPrefix=false")
_PATCH_FLAGS = (
    "-p",
    "-U0",
    "-M",
    "--no-color",
    "--no-ext-diff",
    "--no-textconv",
    "--no-relative",
    "--diff-algorithm=myers",
    "--inter-hunk-context=0",
    "--src-prefix=a/",
    "--dst-prefix=b/",
    "--ignore-submodules=none",
    "-O/dev/null",
)
_LOG_FORMAT = "%x1e%H%x1f%P%x1f%an%x1f%ae%x1f%cn%x1f%ce%x1f%ct%x1f%N%x1f%B"
_REVERT = re.compile(r"This reverts commit ([0-9a-f]{7,40})")
_HUNK = re.compile(r"@@ -(\d+)(?:,(\d+))? \+(\d+)(?:,(\d+))? @@")
_SHA_LINE = re.compile(r"[0-9a-f]{40}")
_CACHE_VERSION = 2
_LINES_KEPT = 8
_KEYS_PER_WORKER = 500  # fewer patches than this per core: one diff-tree is quicker than starting more
_HEADER_FIELDS = ("rename from ", "rename to ", "new file mode ", "deleted file mode ", "--- ", "+++ ")


# --- the plain data -----------------------------------------------------------------------------------


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
class NoteRecord:
    """What the gate's note says about one commit."""

    verdict: str | None
    coverage_percent: float | None
    findings: tuple[Mapping[str, Any], ...]
    waivers: tuple[Mapping[str, Any], ...]
    problem: str | None = None  # why the note cannot be read


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
    verified: bool
    status: str  # unverified | blocked-merged | pass | warn
    verdict: str | None
    coverage_percent: float | None
    findings: tuple[Mapping[str, Any], ...]
    waivers: tuple[Mapping[str, Any], ...]
    note_problem: str | None = None
    reverted_by: str | None = None


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
    verified: int
    unverified: int
    blocked_merged: int

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

    @property
    def attention(self) -> tuple[AuditCommit, ...]:
        return tuple(c for c in self.commits if c.status in ("unverified", "blocked-merged"))


# --- the window ---------------------------------------------------------------------------------------


def parse_when(text: str, *, end_of_day: bool) -> int:
    """Epoch seconds of a date (``YYYY-MM-DD``, UTC; with ``end_of_day`` the next midnight, so that
    ``--until`` names the last day included) or an ISO-8601 date and time (exact; UTC when no zone)."""
    try:
        if len(text) == 10:
            day = date.fromisoformat(text)
            moment = datetime(day.year, day.month, day.day, tzinfo=timezone.utc)
            return int((moment + timedelta(days=1 if end_of_day else 0)).timestamp())
        moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError as error:
        raise UsageError(f"'{text}' is not a date", hint="use YYYY-MM-DD or an ISO-8601 date and time") from error
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=timezone.utc)
    return int(moment.timestamp())


def window_bounds(since: str | None, until: str | None, now: float | None = None) -> tuple[int, int]:
    """The window as epoch seconds [since, until); by default the last 7 days."""
    end = parse_when(until, end_of_day=True) if until else int(now if now is not None else datetime.now().timestamp())
    start = parse_when(since, end_of_day=False) if since else end - 7 * DAY
    if start >= end:
        raise UsageError("the window is empty: --since is not before --until", hint="swap or widen the dates")
    return start, end


def iso(seconds: int) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(seconds))  # datetime's own took twice as long


# --- reading git (the edge) -----------------------------------------------------------------------------


def read_history(
    git: Git,
    ref: str | None,
    since: int,
    until: int,
    *,
    weeks: int = 4,
    notes_ref: str = DEFAULT_NOTES_REF,
    agent_emails: Sequence[str] = (),
    use_cache: bool = True,
) -> History:
    """Read the window and the ``weeks`` weeks before it from ``git``, in a few bulk calls; with the
    cache, a span already audited (same window-end revision, span and agent identities: commits never
    change) is read from it, and only the notes are read again (by their ref's tip)."""
    ref_name = ref or _current_branch(git)
    span_since = since - 7 * DAY * max(weeks, 0)
    end = _window_end(git, ref_name, until)
    waivers, identities, problems = _policy_facts(git, end, until, use_cache)
    emails = tuple(sorted({e.lower() for e in (*agent_emails, *identities)}))
    key = hashlib.sha1(f"{_code_stamp()}\n{end}\n{span_since}\n{until}\n{chr(10).join(emails)}".encode()).hexdigest()
    cached = _load_span(git, key) if use_cache and end is not None else None
    if cached is not None:
        commits, facts, outside = cached
        notes = _read_notes(git, notes_ref, [c.sha for c in commits], use_cache)
        return History(
            ref_name,
            since,
            until,
            span_since,
            end,
            commits,
            notes,
            outside,
            waivers,
            emails,
            tuple(problems),
            facts,
            key,
        )
    records = _log_records(git, end, span_since, until, notes_ref) if end is not None else []
    patches = _patches(git, records, use_cache)
    commits_list = [_log_commit(fields, patches) for fields in records]
    notes = {c.sha: note_body(c.note) for c in commits_list if c.note is not None}
    outside = _outside_reverts(git, commits_list)
    return History(
        ref_name,
        since,
        until,
        span_since,
        end,
        tuple(commits_list),
        notes,
        outside,
        waivers,
        emails,
        tuple(problems),
        None,
        key,
    )


def save_lines(git: Git, history: History, lines: Mapping[str, CommitLines]) -> None:
    """Keep the span's commits and the replay's results (a re-run, or one after ``--recheck``, which
    changes only notes, then reads no commit and no patch at all); the newest few spans are kept."""
    commits = [_commit_row(c) for c in history.commits]
    facts = [
        [*lines[c.sha][:2], list(lines[c.sha].scope), *lines[c.sha][3:6], list(lines[c.sha].lifetimes)]
        for c in history.commits
    ]
    outside = [_commit_row(c) for c in history.outside.values()]
    folder = _cache_dir(git)
    _save_marshal(folder / f"span-{history.lines_key}.bin", [commits, facts, outside])
    _keep_newest(folder, "span-*.bin")


def _commit_row(commit: LogCommit) -> list[Any]:
    """A commit as the span cache keeps it; names and emails interned, so marshal writes each once."""
    names = [
        sys.intern(name) for name in (commit.author, commit.author_email, commit.committer, commit.committer_email)
    ]
    return [commit.sha, " ".join(commit.parents), *names, commit.time, commit.message]


def _load_span(git: Git, key: str) -> tuple[tuple[LogCommit, ...], dict[str, CommitLines], dict[str, LogCommit]] | None:
    """The span's commits, line facts and outside reverted commits from the cache; None when absent or damaged."""
    data = _load_marshal(_cache_dir(git) / f"span-{key}.bin")
    try:
        rows, facts, outside = data  # type: ignore[misc]
        commits = tuple(LogCommit(s, tuple(p.split()), an, ae, cn, ce, t, m) for s, p, an, ae, cn, ce, t, m in rows)
        lines = {c.sha: CommitLines(*entry) for c, entry in zip(commits, facts, strict=True)}
        older = {row[0]: LogCommit(row[0], tuple(row[1].split()), *row[2:]) for row in outside}
    except (TypeError, ValueError):
        return None
    return commits, lines, older


def _read_notes(git: Git, notes_ref: str, shas: Sequence[str], use_cache: bool) -> dict[str, Mapping[str, Any]]:
    """The span's notes, in bulk: ``git notes list`` and one ``cat-file --batch`` of their blobs, or the
    cache of what this same notes ref tip (a commit: its notes never change) gave for this span."""
    full = (
        notes_ref
        if notes_ref.startswith("refs/notes/")
        else f"refs/{notes_ref}"
        if notes_ref.startswith("notes/")
        else f"refs/notes/{notes_ref}"
    )  # as git expands --notes=<ref> (from memory of notes.c)
    notes_tip = git.run(["rev-parse", "-q", "--verify", f"{full}^{{commit}}"], check=False).decode().strip()
    if not notes_tip:
        return {}
    span = hashlib.sha1("\n".join([_code_stamp(), *shas]).encode()).hexdigest()
    cache_file = _cache_dir(git) / f"notes-{notes_tip}-{span}.bin"
    cached = _load_marshal(cache_file) if use_cache else None
    if isinstance(cached, dict):
        return cached
    wanted = set(shas)
    listing = git.run(["notes", "--ref", full, "list"]).decode().split()
    blob_of = {commit: blob for blob, commit in zip(listing[::2], listing[1::2], strict=True) if commit in wanted}
    blobs = git.read_blobs(sorted(set(blob_of.values())))
    bodies = {
        blob: note_body(text)
        for blob, raw in blobs.items()  # a note written twice is read once
        if (text := raw.decode("utf-8", "surrogateescape").rstrip("\n"))
    }
    notes = {sha: bodies[blob_of[sha]] for sha in shas if blob_of.get(sha) in bodies}
    if use_cache:
        _save_marshal(cache_file, notes)
        _keep_newest(cache_file.parent, "notes-*.bin")
    return notes


def _window_end(git: Git, ref_name: str, until: int) -> str | None:
    """The newest first-parent ancestor of ``ref_name`` committed before ``until`` (one git call; a ref
    that is not a commit is then reported as git.resolve reports it)."""
    ask = [
        "rev-list",
        "-1",
        "--first-parent",
        f"--until=@{until - 1}",
        "--end-of-options",
        f"{ref_name}^{{commit}}",
        "--",
    ]
    out = git.run(ask, check=False)
    if not out.strip():
        tip = git.resolve(ref_name)  # raises the usage error when it is not a commit
        out = git.run(["rev-list", "-1", "--first-parent", f"--until=@{until - 1}", tip])
    return out.decode().strip() or None


def _current_branch(git: Git) -> str:
    name = git.run(["symbolic-ref", "-q", "--short", "HEAD"], check=False).decode().strip()
    return name or "HEAD"


def _log_records(git: Git, end: str, since: int, until: int, notes_ref: str) -> list[list[str]]:
    """The span's commits (fields of ``_LOG_FORMAT``, the note by ``%N``: git reads the notes in the same
    walk), parents before children."""
    out = git.run(
        [
            "log",
            "--topo-order",
            "--reverse",
            f"--notes={notes_ref}",
            f"--since=@{since}",
            f"--until=@{until - 1}",
            f"--format={_LOG_FORMAT}",
            end,
            "--",
        ]
    )
    records = []
    for record in out.decode("utf-8", "surrogateescape").split("\x1e")[1:]:
        fields = record.split("\x1f", 8)
        if since <= int(fields[6]) < until:  # git's --since/--until are inclusive and its walk may overshoot
            records.append(fields)
    return records


def _patches(git: Git, records: Sequence[list[str]], use_cache: bool) -> dict[str, list[Any]]:
    """The records' patches by ``diff-tree`` key: from the cache, the rest in one ``diff-tree`` call."""
    cache_file = _cache_dir(git) / f"patches-{_code_stamp()[:16]}.bin"
    loaded = _load_marshal(cache_file) if use_cache else None
    cache = loaded if isinstance(loaded, dict) else {}
    wanted = [key for fields in records for key in _patch_keys(fields[0], fields[1]) if key not in cache]
    if wanted:
        cache.update(_diff_trees(git, wanted))
        if use_cache:
            _save_marshal(cache_file, cache)
            _keep_newest(cache_file.parent, "patches-*.bin", count=2)  # older ones were made by other code
    return cache


def _log_commit(fields: list[str], cache: Mapping[str, list[Any]] | None) -> LogCommit:
    sha, parents, an, ae, cn, ce, when, note, message = fields
    patches = (
        ()
        if cache is None
        else tuple(tuple(FilePatch._make(entry) for entry in cache[key]) for key in _patch_keys(sha, parents))
    )
    return LogCommit(
        sha, tuple(parents.split()), an, ae, cn, ce, int(when), message.rstrip("\n"), patches, note.rstrip("\n") or None
    )


def _patch_keys(sha: str, parents: str) -> list[str]:
    """``diff-tree --stdin`` lines: the commit alone (against its parent, or the empty tree), or one
    ``merge parent`` line per parent of a merge."""
    parent_list = parents.split()
    if len(parent_list) <= 1:
        return [sha]
    return [f"{sha} {parent}" for parent in parent_list]


def _diff_trees(git: Git, keys: list[str]) -> dict[str, list[Any]]:
    """Read the patches of ``keys``: git's diffs are most of a first audit's time and each ``diff-tree``
    uses one core, so a long list is split into one ``diff-tree`` per core, run side by side (their
    output is parsed as each finishes, while the others still run)."""
    workers = min(os.cpu_count() or 1, 4, len(keys) // _KEYS_PER_WORKER)
    if workers <= 1:
        return _diff_tree(git, keys)
    from concurrent.futures import ThreadPoolExecutor

    size = -(-len(keys) // workers)
    chunks = [keys[start : start + size] for start in range(0, len(keys), size)]
    patches: dict[str, list[Any]] = {}
    with ThreadPoolExecutor(max_workers=len(chunks)) as pool:
        for found in pool.map(lambda chunk: _diff_tree(git, chunk), chunks):
            patches.update(found)
    return patches


def _diff_tree(git: Git, keys: list[str]) -> dict[str, list[Any]]:
    """Read the patches of ``keys`` in one call; ``--always`` prints a sha line for each, even when empty."""
    out = git.run(
        [*_CONFIG, "diff-tree", "--stdin", "--always", "--root", "-r", *_PATCH_FLAGS],
        input="".join(f"{key}\n" for key in keys).encode(),
    )
    sections: list[list[str]] = []
    for line in out.decode("utf-8", "surrogateescape").split("\n"):
        # a sha line starts a commit's patch; it is never a patch line (those start with a header word, @,
        # +, - or space); the length test spares the regex on almost every line
        if len(line) == 40 and _SHA_LINE.fullmatch(line):
            sections.append([])
        elif sections:
            sections[-1].append(line)
    if len(sections) != len(keys):
        raise VerifierError(
            f"git diff-tree gave {len(sections)} patches for {len(keys)} commits",
            hint="report this with the repository's git version",
        )
    return {key: _encode_patches(parse_patch(lines)) for key, lines in zip(keys, sections, strict=True)}


def parse_patch(lines: Sequence[str]) -> list[FilePatch]:
    """Read ``git diff -U0`` output (git's patch format) into files and hunks; content lines are skipped
    by the hunk counts, so a content line that looks like a header is never taken for one."""
    files: list[FilePatch] = []
    index = 0
    while index < len(lines):
        if not lines[index].startswith("diff --git "):
            index += 1
            continue
        header_names = lines[index][len("diff --git ") :]
        index += 1
        fields: dict[str, str] = {}
        while index < len(lines) and not lines[index].startswith(("diff --git ", "@@ ")):
            line = lines[index]
            for key in _HEADER_FIELDS:
                if line.startswith(key):
                    fields.setdefault(key.strip(), line[len(key) :])
            index += 1
        hunks, index = _read_hunks(lines, index)
        files.append(_file_patch(header_names, fields, hunks))
    return files


def _read_hunks(lines: Sequence[str], index: int) -> tuple[list[int], int]:
    hunks: list[int] = []
    while index < len(lines) and lines[index].startswith("@@ "):
        match = _HUNK.match(lines[index])
        if match is None:
            raise VerifierError(f"cannot read the hunk header {lines[index]!r}")
        old_start, old_count, new_start, new_count = match.groups()
        hunk = (
            int(old_start),
            1 if old_count is None else int(old_count),
            int(new_start),
            1 if new_count is None else int(new_count),
        )
        hunks.extend(hunk)
        index += 1
        remaining = hunk[1] + hunk[3]
        while index < len(lines) and (remaining > 0 or lines[index].startswith("\\")):
            if not lines[index].startswith("\\"):
                remaining -= 1
            index += 1
    return hunks, index


def _file_patch(header_names: str, fields: Mapping[str, str], hunks: Sequence[int]) -> FilePatch:
    old = _side_path(fields.get("---"), "a/")
    new = _side_path(fields.get("+++"), "b/")
    if "rename from" in fields:
        old, new = _unquote(fields["rename from"]), _unquote(fields.get("rename to", ""))
    elif "---" not in fields:  # no hunks: binary, mode-only or empty files; the header names the path
        same = _same_path(header_names)
        old = None if "new file mode" in fields else same
        new = None if "deleted file mode" in fields else same
    return FilePatch(old, new, hunks)


def _side_path(value: str | None, prefix: str) -> str | None:
    if value is None or value == "/dev/null":
        return None
    path = _unquote(value)
    return path[len(prefix) :] if path.startswith(prefix) else path


def _same_path(names: str) -> str:
    """The path of ``a/P b/P`` (both sides the same, as git prints them when nothing was renamed)."""
    if names.startswith('"'):
        end = names.index('" ', 1)
        return _unquote(names[: end + 1])[2:]
    return names[2 : 2 + (len(names) - 5) // 2]


def _unquote(text: str) -> str:
    """Undo git's C-style quoting of a path (quote.c)."""
    if not (text.startswith('"') and text.endswith('"')):
        return text
    raw = text[1:-1].encode("utf-8", "surrogateescape")
    return codecs.escape_decode(raw)[0].decode("utf-8", "replace")


def _encode_patches(files: list[FilePatch]) -> list[Any]:
    """Plain lists for the cache; paths interned, so marshal writes each path once."""
    return [
        [f.old_path and sys.intern(f.old_path), f.new_path and sys.intern(f.new_path), list(f.hunks)] for f in files
    ]


def _cache_dir(git: Git) -> Path:
    """The audit's cache, under the git dir (safe to delete): patches by commit, which never change (a
    sha names its content), the spans' commits and replay results, notes by their ref's tip."""
    known = getattr(git, "_audit_cache_dir", None)
    if known is None:
        known = git.common_dir() / "verifier" / "audit-cache"
        git._audit_cache_dir = known  # type: ignore[attr-defined]  # one rev-parse per audit, not per file
    return known


@functools.cache
def _code_stamp() -> str:
    """What the cached facts were computed by: this module and the trailer parser (an upgraded verifier
    computes them afresh)."""
    package = Path(__file__).resolve().parents[1]
    code = hashlib.sha1(str(_CACHE_VERSION).encode())
    for name in ("audit/build.py", "provenance/trailers.py"):
        with contextlib.suppress(OSError):
            code.update((package / name).read_bytes())
    return code.hexdigest()


def _keep_newest(folder: Path, pattern: str, count: int = _LINES_KEPT) -> None:
    """Let the cache hold only the newest ``count`` files of one kind (and none of the first cache's
    JSON files, which nothing reads any more)."""
    with contextlib.suppress(OSError):
        kept = sorted(folder.glob(pattern), key=lambda p: p.stat().st_mtime, reverse=True)
        for old in [*kept[count:], *folder.glob("lines-*.json"), *folder.glob("patches-v1.json")]:
            old.unlink(missing_ok=True)


def _load_marshal(path: Path) -> Any:
    """A cache file of plain values (marshal: the fastest to read), checked by the sha-1 of its body
    written before it; None when missing or damaged (the audit then reads git again)."""
    try:
        raw = path.read_bytes()
    except OSError:
        return None
    body = memoryview(raw)[20:]
    if len(raw) < 20 or hashlib.sha1(body).digest() != raw[:20]:
        return None
    with contextlib.suppress(OSError):  # a file in use stays among the newest kept
        os.utime(path)
    try:
        return marshal.loads(body)
    except (EOFError, ValueError, TypeError):
        return None


def _save_marshal(path: Path, data: Any) -> None:
    import tempfile  # only when writing: its imports cost a warm audit's start-up

    body = marshal.dumps(data)
    with contextlib.suppress(OSError):  # the cache only saves time; a read-only git dir is fine
        path.parent.mkdir(parents=True, exist_ok=True)
        handle, temp = tempfile.mkstemp(dir=path.parent, prefix=".tmp-")
        with os.fdopen(handle, "wb") as out:
            out.write(hashlib.sha1(body).digest() + body)
        os.replace(temp, path)


def note_body(text: str) -> Mapping[str, Any]:
    """A note's JSON body, read as verifier.report.notes.read_notes reads it: anything but a JSON object comes
    back as ``{"format": None, "invalid": why}``."""
    try:
        body = json.loads(text)
    except ValueError as error:
        return {"format": None, "invalid": f"not JSON: {error}"}
    return body if isinstance(body, dict) else {"format": None, "invalid": "not a JSON object"}


def _policy_facts(
    git: Git, end: str | None, until: int, use_cache: bool = True
) -> tuple[tuple[WaiverInfo, ...], tuple[str, ...], list[str]]:
    """Waivers and agent identities of the trusted policy at the window's end (a broken policy is a fact
    to report, not a reason to stop the audit). Without an organisation policy (a file on disk, which may
    change) the policy depends only on the window-end revision, its last day, the shipped default and the
    policy code, so a policy read once is kept in the cache: no YAML is parsed (or imported) again."""
    day = datetime.fromtimestamp(until - 1, timezone.utc).date()
    cache_file = _policy_cache_file(git, end, day) if use_cache else None
    cached = _load_marshal(cache_file) if cache_file is not None else None
    if isinstance(cached, list) and len(cached) == 2:
        return tuple(WaiverInfo(*w) for w in cached[0]), tuple(cached[1]), []
    from verifier.policy.loader import load_policy

    try:
        policy = load_policy(git, end, today=day)
    except VerifierError as error:
        return (), (), [f"the trusted policy at the window's end could not be read: {error.message}"]
    waivers = tuple(WaiverInfo(w.rule, w.path, w.reason, w.owner, str(w.expires)) for w in policy.waivers)
    identities = policy.agent_identities
    if cache_file is not None:
        _save_marshal(cache_file, [[[w.rule, w.path, w.reason, w.owner, w.expires] for w in waivers], list(identities)])
        _keep_newest(cache_file.parent, "policy-*.bin")
    return waivers, identities, []


def _policy_cache_file(git: Git, end: str | None, day: date) -> Path | None:
    """Where the policy facts of (window-end revision, day, shipped default, policy code) are kept; None
    when an organisation policy is named (verifier.policy.loader.ORG_POLICY_ENV) or the sources cannot be read."""
    if os.environ.get("VERIFIER_ORG_POLICY"):
        return None
    from verifier.policy.loader import shipped_dir

    code = Path(__file__).resolve().parents[1] / "policy" / "loader.py"
    shipped = shipped_dir() / "default.yaml"
    try:
        sources = [code.read_bytes(), shipped.read_bytes()]
    except OSError:
        return None
    key = hashlib.sha1(b"\n".join([f"{_code_stamp()}\n{end}\n{day.isoformat()}".encode(), *sources]))
    return _cache_dir(git) / f"policy-{key.hexdigest()}.bin"


def _outside_reverts(git: Git, commits: Sequence[LogCommit]) -> dict[str, LogCommit]:
    """The commits that the span's reverts name but that are older than the span."""
    known = {c.sha for c in commits}
    names = {m for c in commits for m in _REVERT.findall(c.message)}
    unknown = [n for n in names if not any(sha.startswith(n) for sha in known)]
    if not unknown:
        return {}
    out = git.run(
        ["log", "--no-walk=unsorted", "--ignore-missing", f"--format={_LOG_FORMAT}", "--stdin"],
        input="".join(f"{n}\n" for n in unknown).encode(),
        check=False,
    )
    found = {}
    for record in out.decode("utf-8", "surrogateescape").split("\x1e")[1:]:
        sha, parents, an, ae, cn, ce, when, _note, message = record.split("\x1f", 8)
        found[sha] = LogCommit(sha, tuple(parents.split()), an, ae, cn, ce, int(when), message.rstrip("\n"))
    return found


# --- which commits a model wrote ------------------------------------------------------------------------


@dataclass(frozen=True)
class Authorship:
    agent: str
    scope: tuple[str, ...]
    marked: bool


def authorship(commit: LogCommit, agent_emails: Iterable[str]) -> Authorship | None:
    """Who wrote ``commit``: its Model-Written trailer, else an author, committer or co-author whose
    email is one of the policy's agent identities; None for a person's commit."""
    from verifier.provenance.trailers import machine_mark, parse_trailers

    if "model-written" in commit.message.lower():  # a cheap test first: most commits carry no trailer
        mark = machine_mark(commit.message)
        if mark is not None:
            return Authorship(mark.agent, mark.scope, True)
    emails = set(agent_emails)
    if not emails:
        return None
    for email in (commit.author_email, commit.committer_email):
        if email.lower() in emails:
            return Authorship(email.lower(), (), False)
    if "co-authored-by" in commit.message.lower():
        for key, value in parse_trailers(commit.message):
            found = re.search(r"<([^>]+)>", value)
            if key.lower() == "co-authored-by" and found and found.group(1).lower() in emails:
                return Authorship(found.group(1).lower(), (), False)
    return None


# --- the replay: which machine lines lived, and how long ----------------------------------------------------


@dataclass
class _Lines:
    """Line ids: ``born[id]`` is the index of the commit that wrote line ``id``; ``died[id]`` the first
    commit that removed it."""

    born: list[int] = field(default_factory=lambda: [-1])
    died: dict[int, int] = field(default_factory=dict)

    def new(self, commit_index: int, count: int) -> list[int]:
        first = len(self.born)
        self.born.extend([commit_index] * count)
        return list(range(first, first + count))

    def bury(self, ids: Iterable[int], commit_index: int) -> None:
        for line in ids:
            if line > 0:
                self.died.setdefault(line, commit_index)


def _apply(old: list[int] | None, hunks: Sequence[int], fresh: Sequence[int], removed: list[int]) -> list[int]:
    """The line ids of a file after ``hunks`` (flat, four numbers each), the added lines taking the ids
    ``fresh`` in order; ``old`` may stop early (the rest of the file is untracked)."""
    source = old or []
    out: list[int] = []
    position = taken = 0
    for at in range(0, len(hunks), 4):
        old_start, old_count, new_count = hunks[at], hunks[at + 1], hunks[at + 3]
        start = old_start - 1 if old_count else old_start  # an insertion goes after line old_start
        out.extend(source[position:start])
        gap = start - max(position, len(source))
        if gap > 0:
            out.extend([UNTRACKED] * gap)
        removed.extend(source[start : start + old_count])
        out.extend(fresh[taken : taken + new_count])
        taken += new_count
        position = start + old_count
    out.extend(source[position:])
    return out


def _mapped(parent: Mapping[str, list[int]], patch: FilePatch) -> list[int]:
    """A parent's ids carried onto the merge's file; PLACEHOLDER where the line is not the parent's."""
    old = parent.get(patch.old_path) if patch.old_path else None
    return _apply(old, patch.hunks, [PLACEHOLDER] * patch.added, [])


class _Replay:
    """Replays the span's patches over per-file line ids, parents before children."""

    def __init__(self, commits: Sequence[LogCommit], scopes: Mapping[str, tuple[str, ...]], end: str | None) -> None:
        self.commits = commits
        self.scopes = scopes  # machine commit sha -> scope
        self.end = end
        self.lines = _Lines()
        self.index = {c.sha: i for i, c in enumerate(commits)}
        self.children = Counter(p for c in commits for p in c.parents if p in self.index)
        self.states: dict[str, dict[str, list[int]]] = {}
        self.machine_added: dict[str, int] = {}

    def run(self) -> dict[str, list[int]]:
        for position, commit in enumerate(self.commits):
            merge = len(commit.patches) > 1
            self.states[commit.sha] = self._merge(position, commit) if merge else self._commit(position, commit)
            if not self.children[commit.sha] and commit.sha != self.end:
                del self.states[commit.sha]
        return self.states.get(self.end or "", {})

    def _take(self, parent: str | None) -> dict[str, list[int]]:
        if parent is None or parent not in self.index:
            return {}
        self.children[parent] -= 1
        if self.children[parent] == 0 and parent != self.end:
            return self.states.pop(parent)
        return dict(self.states[parent])

    def _fresh(self, position: int, commit: LogCommit, path: str, count: int) -> list[int]:
        from verifier.provenance.trailers import path_in_scope

        scope = self.scopes.get(commit.sha)
        if scope is None or not count or not path_in_scope(path, scope):
            return [UNTRACKED] * count
        self.machine_added[commit.sha] = self.machine_added.get(commit.sha, 0) + count
        return self.lines.new(position, count)

    def _commit(self, position: int, commit: LogCommit) -> dict[str, list[int]]:
        state = self._take(commit.parents[0] if commit.parents else None)
        patches = commit.patches[0] if commit.patches else ()
        olds = [state.pop(p.old_path, None) if p.old_path else None for p in patches]
        for patch, old in zip(patches, olds, strict=True):
            if patch.new_path is None:
                self.lines.bury(old or (), position)
                continue
            machine = commit.sha in self.scopes
            if old is None and not machine:
                continue
            fresh = self._fresh(position, commit, patch.new_path, patch.added)
            removed: list[int] = []
            lines = _apply(old, patch.hunks, fresh, removed)
            self.lines.bury(removed, position)
            if any(lines):  # a tracked line left (ids are positive; only a merge's views hold PLACEHOLDER)
                state[patch.new_path] = lines
        return state

    def _merge(self, position: int, commit: LogCommit) -> dict[str, list[int]]:
        """Each line of a merged file comes from the first parent that has it unchanged; lines no parent has
        are the merge's own (machine-written when the merge is)."""
        parents = [self.states.get(p, {}) if p in self.index else {} for p in commit.parents]
        state = dict(parents[0])
        others = [{p.new_path: p for p in patches if p.new_path} for patches in commit.patches[1:]]
        for patch in commit.patches[0]:
            if patch.old_path:
                state.pop(patch.old_path, None)
        for patch in commit.patches[0]:
            if patch.new_path is None:
                continue
            views = [_mapped(parents[0], patch)]
            for parent, by_new in zip(parents[1:], others, strict=True):
                other = by_new.get(patch.new_path)
                views.append(_mapped(parent, other) if other else list(parent.get(patch.new_path, ())))
            if commit.sha not in self.scopes and not any(max(v, default=0) > 0 for v in views):
                continue
            lines = self._combine(position, commit, patch.new_path, views)
            if max(lines, default=0) > 0:
                state[patch.new_path] = lines
        self._bury_merged(position, commit, parents, state)
        for parent in commit.parents:
            if parent in self.index:
                self.children[parent] -= 1
                if self.children[parent] == 0 and parent != self.end:
                    self.states.pop(parent, None)
        return state

    def _bury_merged(
        self, position: int, commit: LogCommit, parents: list[dict[str, list[int]]], state: Mapping[str, list[int]]
    ) -> None:
        """Lines of the files a merge changed that none of its parents passed on died in the merge."""
        before = {
            line
            for patches, parent in zip(commit.patches, parents, strict=True)
            for p in patches
            if p.old_path
            for line in parent.get(p.old_path, ())
            if line > 0
        }
        touched = {p.new_path for patches in commit.patches for p in patches if p.new_path}
        after = {line for path in touched for line in state.get(path, ()) if line > 0}
        self.lines.bury(before - after, position)

    def _combine(self, position: int, commit: LogCommit, path: str, views: list[list[int]]) -> list[int]:
        length = max((len(v) for v in views), default=0)
        out = []
        own = 0
        for line in range(length):
            value = PLACEHOLDER
            for view in views:
                value = view[line] if line < len(view) else UNTRACKED
                if value != PLACEHOLDER:
                    break
            if value == PLACEHOLDER:
                own += 1
            out.append(value)
        if own:
            fresh = iter(self._fresh(position, commit, path, own))
            out = [next(fresh) if v == PLACEHOLDER else v for v in out]
        return out


# --- the computation --------------------------------------------------------------------------------------


def note_record(note: Mapping[str, Any] | None) -> NoteRecord | None:
    """Read a note body defensively; None when there is no note."""
    if note is None:
        return None
    if note.get("format") != 1:
        why = note.get("invalid") or f"note format {note.get('format')!r} is not 1"
        return NoteRecord(None, None, (), (), problem=str(why))
    coverage = note.get("coverage") if isinstance(note.get("coverage"), Mapping) else {}
    percent = coverage.get("percent")
    findings = tuple(f for f in note.get("findings") or () if isinstance(f, Mapping))
    waivers = tuple(w for w in note.get("waivers") or () if isinstance(w, Mapping))
    verdict = note.get("verdict") if isinstance(note.get("verdict"), str) else None
    return NoteRecord(verdict, percent if isinstance(percent, (int, float)) else None, findings, waivers)


def line_facts(commits: Sequence[LogCommit], agent_emails: Iterable[str], end: str | None) -> dict[str, CommitLines]:
    """Replay the span's patches: per commit, lines added, who wrote it, and its machine lines' fates."""
    authors = {c.sha: a for c in commits if (a := authorship(c, agent_emails)) is not None}
    replay = _Replay(commits, {sha: a.scope for sha, a in authors.items()}, end)
    final = replay.run()
    alive_ids = {i for lines in final.values() for i in lines if i > 0}
    alive = Counter(replay.lines.born[i] for i in alive_ids)
    lifetimes: dict[int, list[int]] = defaultdict(list)
    for line, killer in replay.lines.died.items():
        if line not in alive_ids:
            born = replay.lines.born[line]
            lifetimes[born].append(commits[killer].time - commits[born].time)
    facts = {}
    for position, commit in enumerate(commits):
        added = sum(p.added for p in commit.patches[0]) if len(commit.patches) == 1 else 0
        author = authors.get(commit.sha)
        if author is None:
            facts[commit.sha] = CommitLines(added)
        else:
            facts[commit.sha] = CommitLines(
                added,
                author.agent,
                tuple(author.scope),
                author.marked,
                replay.machine_added.get(commit.sha, 0),
                alive[position],
                tuple(sorted(lifetimes[position])),
            )
    return facts


def compute_audit(history: History, settings: Settings | None = None) -> Audit:
    """The audit of ``history``: plain data in, plain data out."""
    settings = settings or Settings()
    facts = (
        history.lines if history.lines is not None else line_facts(history.commits, history.agent_emails, history.end)
    )
    reverts, reverted_by = _reverts(history, facts)
    rows = {
        c.sha: _row(c, facts[c.sha], history.notes.get(c.sha), settings.churn_days, reverted_by.get(c.sha))
        for c in history.commits
        if facts[c.sha].agent is not None
    }
    in_window = [c for c in history.commits if c.time >= history.since]
    window_rows = [rows[c.sha] for c in in_window if c.sha in rows]
    ordered = sorted(window_rows, key=lambda r: r.date, reverse=True)
    ordered.sort(key=lambda r: {"unverified": 0, "blocked-merged": 1}.get(r.status, 2))
    window = _period(history.since, history.until, in_window, rows, facts)
    return Audit(
        ref=history.ref,
        end=history.end,
        window=window,
        churn_days=settings.churn_days,
        commits=tuple(ordered),
        agents=_groups(window_rows, lambda r: r.agent),
        people=_groups(window_rows, lambda r: r.committer),
        findings_by_rule=_finding_counts(window_rows),
        waivers_by_rule=tuple(Counter(str(w.get("rule")) for r in window_rows for w in r.waivers).most_common()),
        expiring_waivers=_expiring(history.waivers, history.until, settings.expiry_days),
        reverts=tuple(r for r in reverts if parse_iso(r.date) >= history.since),
        trend=_trend(history, rows, facts, settings.weeks, window),
        problems=history.problems,
    )


def parse_iso(text: str) -> int:
    return int(datetime.strptime(text, "%Y-%m-%dT%H:%M:%SZ").replace(tzinfo=timezone.utc).timestamp())


def _reverts(history: History, facts: Mapping[str, CommitLines]) -> tuple[list[Revert], dict[str, str]]:
    by_prefix = {c.sha: c for c in history.commits} | dict(history.outside)
    reverts, reverted_by = [], {}
    for commit in history.commits:
        for name in _REVERT.findall(commit.message):
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
    record = note_record(note)
    verified = record is not None and record.problem is None and record.verdict in VERIFIED_VERDICTS
    verdict = record.verdict if record else None
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
        coverage_percent=record.coverage_percent if record else None,
        findings=record.findings if record else (),
        waivers=record.waivers if record else (),
        note_problem=(record.problem if record else "no note: the gate was skipped or never ran"),
        reverted_by=reverted_by,
    )


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


def _finding_counts(rows: Sequence[AuditCommit]) -> tuple[tuple[str, str, int], ...]:
    counts = Counter((str(f.get("rule")), str(f.get("severity"))) for r in rows for f in r.findings)
    return tuple((rule, severity, n) for (rule, severity), n in sorted(counts.items(), key=lambda kv: (-kv[1], kv[0])))


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


# --- the whole audit, and filling the gaps -------------------------------------------------------------------


@dataclass(frozen=True)
class AuditRequest:
    """What the command line asked for."""

    since: str | None = None
    until: str | None = None
    ref: str | None = None
    weeks: int = 4
    churn_days: int = 14
    expiry_days: int = 14
    agent_emails: tuple[str, ...] = ()
    notes_ref: str = DEFAULT_NOTES_REF
    use_cache: bool = True


def run_audit(repo: str | os.PathLike[str], request: AuditRequest, now: float | None = None) -> Audit:
    """Audit the repository at ``repo``."""
    if request.weeks < 0 or request.churn_days < 0 or request.expiry_days < 0:
        raise UsageError("--weeks, --churn-days and --expiry-days must not be negative")
    with no_cycle_collection():
        return _run_audit(repo, request, now)


def _open(repo: str | os.PathLike[str]) -> Git:
    """The repository's top level and its common git dir in one git call (a repository that is not
    one, or has no working tree, is reported by Git.toplevel)."""
    out = Git(repo).run(["rev-parse", "--show-toplevel", "--git-common-dir"], check=False)
    found = out.decode("utf-8", "surrogateescape").splitlines()
    if len(found) != 2 or not found[0]:
        return Git(Git(repo).toplevel())
    git = Git(found[0])
    git._audit_cache_dir = (Path(repo) / found[1]).resolve() / "verifier" / "audit-cache"  # type: ignore[attr-defined]
    return git


@contextlib.contextmanager
def no_cycle_collection() -> Iterator[None]:
    """The audit makes tens of thousands of small objects and no reference cycles: the cycle collector,
    which runs after every few hundred allocations, would only walk them again and again."""
    enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if enabled:
            gc.enable()


def _run_audit(repo: str | os.PathLike[str], request: AuditRequest, now: float | None) -> Audit:
    git = _open(repo)
    since, until = window_bounds(request.since, request.until, now)
    history = read_history(
        git,
        request.ref,
        since,
        until,
        weeks=request.weeks,
        notes_ref=request.notes_ref,
        agent_emails=request.agent_emails,
        use_cache=request.use_cache,
    )
    if history.lines is None:
        lines = line_facts(history.commits, history.agent_emails, history.end)
        if request.use_cache:
            save_lines(git, history, lines)
        history = replace(history, lines=lines)
    audit = compute_audit(history, Settings(request.weeks, request.churn_days, request.expiry_days))
    return replace(audit, notes_ref=request.notes_ref)


def recheck(repo: str | os.PathLike[str], audit: Audit, sandbox: str = "auto", progress: Any = None) -> list[str]:
    """Run the gate on each unverified machine commit of ``audit`` and write its note; return the problems."""
    from verifier.change.stage import RevisionSpec
    from verifier.pipeline import Options, verify
    from verifier.report.notes import write_notes

    git = Git(Git(repo).toplevel())
    problems = []
    for row in audit.commits:
        if row.status != "unverified" or row.merge:
            continue
        if progress:
            progress(f"checking {row.sha[:12]} ({row.subject})")
        try:
            report = verify(repo, RevisionSpec(text=row.sha), Options(sandbox=sandbox))
        except VerifierError as error:
            problems.append(f"{row.sha[:12]}: {error.message}")
            continue
        write_notes(git, report, audit.notes_ref)
    return problems
