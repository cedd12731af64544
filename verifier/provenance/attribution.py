"""The provenance stage: which added lines of the final diff a model wrote.

A commit is machine-written when its message carries a ``Model-Written`` trailer, optionally scoped
to some paths by ``Model-Written-Scope`` trailers (see docs/trailers.md). An added line is
machine-written when the commit that last introduced it (``git blame`` of head, restricted to the
range) is machine-written and the line's path is in that commit's scope: a later human edit of a line
makes it human. A change of a single non-merge commit needs no blame: every added line is its own.
"""

from __future__ import annotations

from verifier.gitio import Git
from verifier.models import Change, MachineMark, Provenance
from verifier.provenance.trailers import machine_mark, path_in_scope


def attribute(git: Git, change: Change) -> Provenance:
    """Find the machine-written lines of ``change``."""
    marks = {c.sha: mark for c in change.commits if (mark := machine_mark(c.message)) is not None}
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
    return Provenance(machine_lines, line_commits, marks, _machine_touched(git, change, marks, single))


def _machine_touched(git: Git, change: Change, marks: dict[str, MachineMark], single: str | None) -> frozenset[str]:
    """The paths a machine-written commit touched (within its scope): who may have removed or renamed what."""
    if single is not None:
        paths = {p for f in change.files for p in (f.path, f.old_path) if p}
        return frozenset(p for p in paths if _is_machine(marks.get(single), p))
    touched = git.touched_paths(list(marks))
    return frozenset(p for sha, paths in touched.items() for p in paths if _is_machine(marks[sha], p))


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
