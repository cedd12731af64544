"""Keeping the policy valid: the commit and push hooks refuse a change that leaves it broken.

A broken ``verifier.yaml`` (or a broken file it extends) committed by anyone would stop every later check
with exit 2, so the hooks validate the policy whenever a commit changes one of those files, human or
machine. The test on paths is by name only (:func:`~verifier.policy.schema.may_change_policy`): no YAML is
read, and nothing heavy imported, for a commit that touches none of them.
"""

from __future__ import annotations

from verifier.errors import VerifierError
from verifier.gitio import Git
from verifier.policy.schema import may_change_policy


def staged_policy_problem(git: Git) -> str | None:
    """What is wrong with the policy the staged change would commit (``index:file:line: ...``), else None."""
    staged = git.run(["diff", "--cached", "--name-only", "--no-renames", "-z"], check=False)
    if not may_change_policy(staged.decode("utf-8", "surrogateescape").split("\0")):
        return None
    from verifier.policy.loader import check_policy_at

    try:
        check_policy_at(git, None)
    except VerifierError as error:
        return str(error)
    return None


def pushed_policy_problem(git: Git, spec: str) -> str | None:
    """What is wrong with the policy at the first commit of ``spec`` (``A..B`` or one commit) that leaves
    it broken, among those that change it; None when every one leaves it valid."""
    left, _, right = spec.rpartition("..")
    shas = git.rev_list(left or None, right)
    changing = [sha for sha, paths in git.touched_paths(shas).items() if may_change_policy(paths)]
    if not changing:
        return None
    from verifier.policy.loader import check_policy_at

    for sha in changing:
        try:
            check_policy_at(git, sha)
        except VerifierError as error:
            return f"commit {sha[:12]} leaves the policy broken: {error}"
    return None
