"""The replay: which machine-written lines of the span lived to the window's end, and how long the others did.

The window's patches (``-U0`` hunks) are replayed commit by commit in topological order, each
machine-written line carrying its own id: the lines alive in the window-end revision are those ``git
blame`` of that revision gives to the window's machine commits (tests/test_audit.py checks the two agree),
and the replay also knows when each line died, which gives churn. A merge takes each line from the first
parent that has it unchanged, as blame does. One pass over the patches replaces a blame per file, which
walks the whole history each time.
"""

from __future__ import annotations

from collections import Counter, defaultdict
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field

from verifier.audit.authorship import authorship
from verifier.audit.model import CommitLines, FilePatch, LogCommit

UNTRACKED = 0  # a line written before the span or by a person: no identity needed
PLACEHOLDER = -1  # a merge's line not yet matched to a parent


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
        for parent_sha in commit.parents:
            if parent_sha in self.index:
                self.children[parent_sha] -= 1
                if self.children[parent_sha] == 0 and parent_sha != self.end:
                    self.states.pop(parent_sha, None)
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
