"""The change stage: a revision spec becomes a Change (base, head, commits, final diff).

Specs: ``A..B`` (from the merge-base of A and B to B; the commits of ``git rev-list A..B``), ``C``
(one commit against its first parent), ``--staged`` (the index against HEAD, with the pending
message), and no spec (``@{upstream}..HEAD`` when there is an upstream, else ``HEAD``).
"""

from __future__ import annotations

from dataclasses import dataclass

from verifier.change.diff import DIFF_ARGS, GITLINK_MODE, RAW_ARGS, parse_diff
from verifier.errors import CannotVerify, UsageError
from verifier.gitio import Git
from verifier.models import INDEX, Change, Commit, FileChange


@dataclass(frozen=True)
class RevisionSpec:
    """What the user asked to check."""

    text: str | None = None  # "A..B", "C" or None
    staged: bool = False
    message: str = ""  # the pending commit message, for --staged


def read_change(git: Git, spec: RevisionSpec) -> Change:
    """Resolve ``spec`` in ``git`` and read its commits and final diff."""
    if spec.staged:
        return _staged(git, spec.message)
    text = spec.text or _default_spec(git)
    if "..." in text:
        raise UsageError(f"'{text}': symmetric ranges are not supported", hint="use A..B (from the merge-base)")
    if ".." in text:
        return _range(git, text)
    return _single(git, text)


def _default_spec(git: Git) -> str:
    if not git.has_commits():
        raise UsageError("the repository has no commit yet", hint="use --staged to check what is staged")
    return "@{upstream}..HEAD" if git.upstream() else "HEAD"


def _range(git: Git, text: str) -> Change:
    left, right = text.split("..", 1)
    left_sha, right_sha = git.resolve(left or "HEAD"), git.resolve(right or "HEAD")
    base = git.merge_base(left_sha, right_sha)
    if base is None:
        hint = "deepen the clone (git fetch --deepen=50 or --unshallow)" if git.is_shallow() else None
        raise CannotVerify(f"'{left}' and '{right}' have no common ancestor", hint=hint)
    commits = git.commits(git.rev_list(left_sha, right_sha))
    return Change(text, "range", base, right_sha, tuple(commits), _diff(git, base, right_sha))


def _single(git: Git, text: str) -> Change:
    sha = git.resolve(text)
    parent = git.first_parent(sha)
    if parent is None and _is_shallow_boundary(git, sha):
        raise CannotVerify(
            f"{sha[:12]} is at the edge of a shallow clone; its parent is not here",
            hint="fetch more history: git fetch --deepen=1",
        )
    commits = git.commits(git.rev_list(parent, sha))
    return Change(text, "commit", parent, sha, tuple(commits), _diff(git, parent, sha))


def _staged(git: Git, message: str) -> Change:
    base = git.resolve("HEAD") if git.has_commits() else None
    author, committer = _ident(git, "GIT_AUTHOR_IDENT"), _ident(git, "GIT_COMMITTER_IDENT")
    pending = Commit(INDEX, (base,) if base else (), author, committer, message)
    return Change("--staged", "staged", base, INDEX, (pending,), _diff(git, base, None))


def _ident(git: Git, variable: str) -> str:
    """Who would make the pending commit ("name <email>"), or "unknown" when git has no identity."""
    ident = git.run(["var", variable], check=False).decode("utf-8", "replace").strip()
    return ident.rsplit(" ", 2)[0] if ident else "unknown"


def _diff(git: Git, base: str | None, head: str | None) -> tuple[FileChange, ...]:
    start = base or git.empty_tree()
    listing = git.diff(RAW_ARGS, start, head) if RAW_ARGS else None
    return parse_diff(git.diff(DIFF_ARGS, start, head), listing)


def submodules(change: Change) -> tuple[str, ...]:
    """The paths of the change that are (or were) submodules."""
    return tuple(f.path for f in change.files if GITLINK_MODE in (f.old_mode, f.new_mode))


def refuse_machine_submodules(change: Change, machine_touched: frozenset[str]) -> None:
    """A machine-written commit that adds, moves or updates a submodule brings in code of another
    repository, which the gate cannot see into: could not verify, naming the path."""
    touched = [path for path in submodules(change) if path in machine_touched]
    if touched:
        raise CannotVerify(
            f"a machine-written commit changes the submodule {', '.join(repr(p) for p in touched)}: the code it "
            "points to lives in another repository, which this check cannot verify",
            "change the submodule in a separate, human-written commit (verify its repository on its own)",
        )


def _is_shallow_boundary(git: Git, sha: str) -> bool:
    shallow = git.common_dir() / "shallow"
    return shallow.is_file() and sha in shallow.read_text().split()
