"""The audit's reading edge: a few bulk git calls, and the cache that spares most of them next time.

One ``git log`` of the window and the trend weeks before it with their notes, ``git diff-tree --stdin``
for the patches not yet cached (:mod:`.patches`), the trusted policy at the window's end. Git is reached
only through :class:`verifier.gitio.Git`, notes are read by :mod:`verifier.report.notes`, and the cache
is :mod:`verifier.cache` (kind ``audit``).

The cache (marshal files of plain lists, each checked by the sha-1 of its body) holds only what a sha
fixes: patches by commit; a span's commits and the replay's results by window-end revision, span and
agent identities; the policy's waivers by window-end revision, day and the shipped default (not with an
organisation policy); the span's notes by the notes ref's tip commit. A second audit of the same window
therefore runs no ``git log`` and reads no patch: a few ``rev-parse`` calls, and the notes again (``git
notes list`` and one ``cat-file --batch``) only when their ref has moved. Every key also holds a hash of
the code that computed it (:func:`code_stamp`), so a changed verifier computes afresh.
"""

from __future__ import annotations

import contextlib
import functools
import hashlib
import os
import sys
from collections.abc import Mapping, Sequence
from datetime import date, datetime, timezone
from pathlib import Path
from typing import Any

from verifier import cache
from verifier.audit.model import DAY, DEFAULT_NOTES_REF, REVERT, CommitLines, FilePatch, History, LogCommit, WaiverInfo
from verifier.audit.patches import patch_keys, read_patches
from verifier.errors import VerifierError
from verifier.gitio import Git
from verifier.report.notes import expand_notes_ref, parse_note

LOG_FORMAT = "%x1e%H%x1f%P%x1f%an%x1f%ae%x1f%cn%x1f%ce%x1f%ct%x1f%N%x1f%B"
CACHE_VERSION = 3
SPANS_KEPT = 8  # the newest few spans, notes and policies are kept
STAMPED = (
    "audit/history.py",
    "audit/patches.py",
    "audit/replay.py",
    "audit/authorship.py",
    "audit/model.py",
    "change/diff.py",
    "report/notes.py",
    "provenance/trailers.py",
)


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
    ref_name = ref or git.current_branch() or "HEAD"
    span_since = since - 7 * DAY * max(weeks, 0)
    end = git.newest_first_parent_before(ref_name, until)
    waivers, identities, problems = _policy_facts(git, end, until, use_cache)
    emails = tuple(sorted({e.lower() for e in (*agent_emails, *identities)}))
    key = cache.key(code_stamp(), str(end), str(span_since), str(until), *emails)
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
    notes = {c.sha: parse_note(c.note) for c in commits_list if c.note is not None}
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
    folder = cache.folder(git, "audit")
    cache.save_marshal(folder / f"span-{history.lines_key}.bin", [commits, facts, outside])
    cache.keep_newest(folder, "span-*.bin", SPANS_KEPT)


def _commit_row(commit: LogCommit) -> list[Any]:
    """A commit as the span cache keeps it; names and emails interned, so marshal writes each once."""
    names = [
        sys.intern(name) for name in (commit.author, commit.author_email, commit.committer, commit.committer_email)
    ]
    return [commit.sha, " ".join(commit.parents), *names, commit.time, commit.message]


def _load_span(git: Git, key: str) -> tuple[tuple[LogCommit, ...], dict[str, CommitLines], dict[str, LogCommit]] | None:
    """The span's commits, line facts and outside reverted commits from the cache; None when absent or damaged."""
    data = cache.load_marshal(cache.folder(git, "audit") / f"span-{key}.bin")
    try:
        rows, facts, outside = data
        commits = tuple(LogCommit(s, tuple(p.split()), an, ae, cn, ce, t, m) for s, p, an, ae, cn, ce, t, m in rows)
        lines = {c.sha: CommitLines(*entry) for c, entry in zip(commits, facts, strict=True)}
        older = {row[0]: LogCommit(row[0], tuple(row[1].split()), *row[2:]) for row in outside}
    except (TypeError, ValueError):
        return None
    return commits, lines, older


def _read_notes(git: Git, notes_ref: str, shas: Sequence[str], use_cache: bool) -> dict[str, Mapping[str, Any]]:
    """The span's notes, in bulk: ``git notes list`` and one ``cat-file --batch`` of their blobs, or the
    cache of what this same notes ref tip (a commit: its notes never change) gave for this span."""
    full = expand_notes_ref(notes_ref)
    notes_tip = git.commit_or_none(full)
    if not notes_tip:
        return {}
    span = cache.key(code_stamp(), *shas)
    cache_file = cache.folder(git, "audit") / f"notes-{notes_tip}-{span}.bin"
    cached = cache.load_marshal(cache_file) if use_cache else None
    if isinstance(cached, dict):
        return cached
    wanted = set(shas)
    blob_of = {commit: blob for commit, blob in git.note_blobs(full).items() if commit in wanted}
    blobs = git.read_blobs(sorted(set(blob_of.values())))
    bodies = {
        blob: parse_note(text)
        for blob, raw in blobs.items()  # a note written twice is read once
        if (text := raw.decode("utf-8", "surrogateescape").rstrip("\n"))
    }
    notes: dict[str, Mapping[str, Any]] = {sha: bodies[blob_of[sha]] for sha in shas if blob_of.get(sha) in bodies}
    if use_cache:
        cache.save_marshal(cache_file, notes)
        cache.keep_newest(cache_file.parent, "notes-*.bin", SPANS_KEPT)
    return notes


def _log_records(git: Git, end: str, since: int, until: int, notes_ref: str) -> list[list[str]]:
    """The span's commits (fields of ``LOG_FORMAT``, the note by ``%N``: git reads the notes in the same
    walk), parents before children."""
    out = git.log_span(end, since, until, notes_ref, LOG_FORMAT)
    records = []
    for record in out.decode("utf-8", "surrogateescape").split("\x1e")[1:]:
        fields = record.split("\x1f", 8)
        if since <= int(fields[6]) < until:  # git's --since/--until are inclusive and its walk may overshoot
            records.append(fields)
    return records


def _patches(git: Git, records: Sequence[list[str]], use_cache: bool) -> dict[str, list[Any]]:
    """The records' patches by ``diff-tree`` key: from the cache, the rest read from git."""
    cache_file = cache.folder(git, "audit") / f"patches-{code_stamp()[:16]}.bin"
    loaded = cache.load_marshal(cache_file) if use_cache else None
    known = loaded if isinstance(loaded, dict) else {}
    wanted = [key for fields in records for key in patch_keys(fields[0], fields[1]) if key not in known]
    if wanted:
        known.update(read_patches(git, wanted))
        if use_cache:
            cache.save_marshal(cache_file, known)
            cache.keep_newest(cache_file.parent, "patches-*.bin", 2)  # older ones were made by other code
    return known


def _log_commit(fields: list[str], cache: Mapping[str, list[Any]] | None) -> LogCommit:
    sha, parents, an, ae, cn, ce, when, note, message = fields
    patches = (
        ()
        if cache is None
        else tuple(tuple(FilePatch._make(entry) for entry in cache[key]) for key in patch_keys(sha, parents))
    )
    return LogCommit(
        sha, tuple(parents.split()), an, ae, cn, ce, int(when), message.rstrip("\n"), patches, note.rstrip("\n") or None
    )


@functools.cache
def code_stamp() -> str:
    """What the cached facts were computed by: the modules that read and replay the history, the diff
    reader, the note reader and the trailer parser (an upgraded verifier computes them afresh)."""
    package = Path(__file__).resolve().parents[1]
    code = hashlib.sha1(str(CACHE_VERSION).encode())
    for name in STAMPED:
        with contextlib.suppress(OSError):
            code.update((package / name).read_bytes())
    return code.hexdigest()


def _policy_facts(
    git: Git, end: str | None, until: int, use_cache: bool = True
) -> tuple[tuple[WaiverInfo, ...], tuple[str, ...], list[str]]:
    """Waivers and agent identities of the trusted policy at the window's end (a broken policy is a fact
    to report, not a reason to stop the audit). Without an organisation policy (a file on disk, which may
    change) the policy depends only on the window-end revision, its last day, the shipped default and the
    policy code, so a policy read once is kept in the cache: no YAML is parsed (or imported) again."""
    day = datetime.fromtimestamp(until - 1, timezone.utc).date()
    cache_file = _policy_cache_file(git, end, day) if use_cache else None
    cached = cache.load_marshal(cache_file) if cache_file is not None else None
    if isinstance(cached, list) and len(cached) == 2:
        return tuple(WaiverInfo(*w) for w in cached[0]), tuple(cached[1]), []
    from verifier.policy.loader import load_policy

    try:
        policy = load_policy(git, end, today=day)
    except VerifierError as error:
        return (), (), [f"the trusted policy at the window's end could not be read: {error.message}"]
    waivers = tuple(
        WaiverInfo(w.rule, w.path, w.reason, w.owner, str(w.expires))
        for w in (*policy.waivers, *policy.expired_waivers)
    )
    identities = policy.agent_identities
    if cache_file is not None:
        cache.save_marshal(
            cache_file, [[[w.rule, w.path, w.reason, w.owner, w.expires] for w in waivers], list(identities)]
        )
        cache.keep_newest(cache_file.parent, "policy-*.bin", SPANS_KEPT)
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
    key = cache.key(code_stamp(), str(end), day.isoformat(), *sources)
    return cache.folder(git, "audit") / f"policy-{key}.bin"


def _outside_reverts(git: Git, commits: Sequence[LogCommit]) -> dict[str, LogCommit]:
    """The commits that the span's reverts name but that are older than the span."""
    known = {c.sha for c in commits}
    names = {m for c in commits for m in REVERT.findall(c.message)}
    unknown = [n for n in names if not any(sha.startswith(n) for sha in known)]
    if not unknown:
        return {}
    out = git.log_named(unknown, LOG_FORMAT)
    found = {}
    for record in out.decode("utf-8", "surrogateescape").split("\x1e")[1:]:
        sha, parents, an, ae, cn, ce, when, _note, message = record.split("\x1f", 8)
        found[sha] = LogCommit(sha, tuple(parents.split()), an, ae, cn, ce, int(when), message.rstrip("\n"))
    return found
