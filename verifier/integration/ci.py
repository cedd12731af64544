"""CI helpers: a pull request is checked in a shallow clone, so fetch the history the check needs.

A range ``A..B`` needs the merge-base of A and B; one commit needs its parent. :func:`deepen_for` runs
``git fetch --deepen=STEP <remote>`` until that history is present, at most ``rounds`` times; it never
touches the working tree, the index or the branches (a fetch updates remote-tracking refs only). When
the history is still missing, the change stage stops with "could not verify" and says what to fetch.
"""

from __future__ import annotations

from collections.abc import Callable

from verifier.gitio import Git
from verifier.words import counted

DEFAULT_ROUNDS = 10


def deepen_for(
    git: Git, spec: str | None, step: int, rounds: int = DEFAULT_ROUNDS, say: Callable[[str], None] = lambda _text: None
) -> int:
    """Deepen a shallow clone until ``spec`` can be checked; return how many fetches it took."""
    fetches = 0
    while git.is_shallow() and not history_ready(git, spec) and fetches < rounds:
        remote = remote_for(git, spec)
        say(f"shallow clone: fetching {counted(step, 'more commit')} of history from {remote}")
        git.run(["fetch", "--quiet", "--no-tags", f"--deepen={step}", remote])
        fetches += 1
    return fetches


def history_ready(git: Git, spec: str | None) -> bool:
    """Whether the base of ``spec`` is present: the merge-base of a range, the parent of a commit."""
    if not spec:
        return True
    if ".." in spec:
        left, right = spec.split("..", 1)
        if not (_exists(git, left or "HEAD") and _exists(git, right or "HEAD")):
            return False
        return git.merge_base(left or "HEAD", right or "HEAD") is not None
    if not _exists(git, spec):
        return False
    sha = git.resolve(spec)
    return git.first_parent(sha) is not None or not _at_shallow_edge(git, sha)


def remote_for(git: Git, spec: str | None) -> str:
    """The remote a range's left side comes from (``origin/main`` -> ``origin``), else the first remote."""
    remotes = git.run(["remote"], check=False).decode().split()
    left = (spec or "").split("..", 1)[0]
    for remote in remotes:
        if left.startswith((f"{remote}/", f"refs/remotes/{remote}/")):
            return remote
    return "origin" if "origin" in remotes or not remotes else remotes[0]


def _exists(git: Git, rev: str) -> bool:
    return git.ok(["rev-parse", "--verify", "--quiet", "--end-of-options", f"{rev}^{{commit}}"])


def _at_shallow_edge(git: Git, sha: str) -> bool:
    shallow = git.common_dir() / "shallow"
    return shallow.is_file() and sha in shallow.read_text().split()
