"""The provenance stage: which added lines of the final diff a model wrote.

A commit is machine-written when its message carries a ``Model-Written`` trailer, optionally scoped
to some paths by ``Model-Written-Scope`` trailers (see docs/trailers.md). An added line is
machine-written when the commit that last introduced it (``git blame`` of head, restricted to the
range) is machine-written and the line's path is in that commit's scope: a later human edit of a line
makes it human, unless it changed only white space (blame ignores white space, ``git blame -w``). A change
of a single non-merge commit needs no blame: every added line is its own.

A commit that reverts a revert of a machine-written commit (``This reverts commit <sha>.``, as ``git
revert`` writes it) puts the machine's lines back: it carries the original commit's mark.
"""

from __future__ import annotations

import re

from verifier.gitio import Git
from verifier.models import Change, Commit, MachineMark, Provenance
from verifier.provenance.trailers import MACHINE_KEY, machine_mark, path_in_scope

# git revert's message body: "This reverts commit <full sha>." (git-revert documentation; the wording is git's)
_REVERTS = re.compile(r"^This reverts commit ([0-9a-f]{40})\b", re.MULTILINE)
_MAX_REVERT_DEPTH = 8


def attribute(git: Git, change: Change) -> Provenance:
    """Find the machine-written lines of ``change``."""
    marks = {c.sha: mark for c in change.commits if (mark := _mark_of(git, c)) is not None}
    if not marks:
        return Provenance({}, {}, {})
    single = _single_author(change)
    line_commits: dict[str, dict[int, str]] = {}
    for file in change.files:
        if file.binary or not file.added_lines:
            continue
        if single is not None:
            line_commits[file.path] = dict.fromkeys(file.added_lines, single)
        else:
            line_commits[file.path] = _blame(git, change, file.path, file.added_lines)
    machine_lines = {
        path: lines
        for path, owners in line_commits.items()
        if (lines := tuple(sorted(n for n, sha in owners.items() if _is_machine(marks.get(sha), path))))
    }
    touched = _touched_by_commit(git, change, marks, single)
    within_scope = frozenset(p for sha, paths in touched.items() for p in paths if _is_machine(marks[sha], p))
    misses = {
        sha: tuple(paths)
        for sha, paths in touched.items()
        if marks[sha].scope and paths and not any(path_in_scope(p, marks[sha].scope) for p in paths)
    }
    return Provenance(machine_lines, line_commits, marks, within_scope, misses)


def has_mark_text(change: Change) -> bool:
    """Whether any commit message of the change mentions the machine mark's key at all (cheap: a substring)."""
    return any(MACHINE_KEY.lower() in c.message.lower() for c in change.commits)


def _mark_of(git: Git, commit: Commit) -> MachineMark | None:
    """The commit's own mark, or the mark a revert of a revert (of a revert of a revert...) inherits."""
    mark = machine_mark(commit.message)
    if mark is not None:
        return mark
    message, depth = commit.message, 0
    while depth < _MAX_REVERT_DEPTH and (reverted := _REVERTS.search(message)) is not None:
        found = git.commits([reverted.group(1)])
        if not found:
            return None
        message, depth = found[0].message, depth + 1
        mark = machine_mark(message)
        if mark is not None:
            return mark if depth % 2 == 0 else None  # an odd depth takes the machine's lines out again
    return None


def _touched_by_commit(
    git: Git, change: Change, marks: dict[str, MachineMark], single: str | None
) -> dict[str, list[str]]:
    """The paths each machine-written commit touched (old and new names)."""
    if single is not None:
        return {single: sorted({p for f in change.files for p in (f.path, f.old_path) if p})}
    return git.touched_paths(list(marks))


def _single_author(change: Change) -> str | None:
    """The one commit that wrote every added line, when the change is a single non-merge commit."""
    if len(change.commits) == 1 and len(change.commits[0].parents) <= 1:
        return change.commits[0].sha
    return None


def _is_machine(mark: MachineMark | None, path: str) -> bool:
    return mark is not None and path_in_scope(path, mark.scope)


def _blame(git: Git, change: Change, path: str, lines: tuple[int, ...]) -> dict[int, str]:
    """Map each of ``lines`` (in head) to the commit that introduced it; boundary lines map to ''."""
    porcelain = git.blame_porcelain(change.base, change.head, path, lines)
    owners: dict[int, str] = {}
    boundary: set[str] = set()
    sha = ""
    final_line = 0
    for raw in porcelain.split(b"\n"):
        if raw.startswith(b"\t"):
            owners[final_line] = "" if sha in boundary else sha
            continue
        fields = raw.split(b" ")
        if len(fields) >= 3 and len(fields[0]) == 40 and fields[1].isdigit():
            sha, final_line = fields[0].decode(), int(fields[2])
        elif raw == b"boundary":
            boundary.add(sha)
    return owners
