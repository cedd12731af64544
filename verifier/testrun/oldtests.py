"""Old tests judge new code: the base version of every test file a machine commit modifies, run at head.

A change that rewrites an expectation to fit a wrong implementation passes its own tests; the test as it was
at base does not. For each existing test file a machine-written commit modifies (or renames), the head tree
is exported, the file's base text is written back at its head path, and those files' tests run in the
sandbox like any run. ``tests.rewritten`` (:mod:`verifier.rules.census`) reports each base test that fails
there (and passed at base: the census knows), whatever the syntax of the rewrite.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import replace
from typing import TYPE_CHECKING

from verifier.models import Change, FileChange, OldTestsRun, Policy, Provenance, RunResult, Selection
from verifier.testrun.census import touched_test_files
from verifier.words import counted

if TYPE_CHECKING:
    from verifier.gitio import Git
    from verifier.sandbox import Backend


def rewritten_files(change: Change, provenance: Provenance) -> tuple[FileChange, ...]:
    """The test files that exist at base and at head and that a machine-written commit modified."""
    tests = set(touched_test_files(change))
    touched = provenance.machine_touched
    return tuple(
        f
        for f in change.files
        if f.old_path in tests
        and f.status != "deleted"
        and not f.binary
        and (f.path in provenance.machine_lines or f.path in touched or f.old_path in touched)
    )


def with_old_tests(
    git: Git,
    change: Change,
    provenance: Provenance,
    policy: Policy,
    run: RunResult,
    backend: Backend,
    say: Callable[[str], None] = lambda _message: None,
) -> RunResult:
    """``run`` with the outcomes of the base test files at head (``old_tests``; None: no such file)."""
    files = rewritten_files(change, provenance)
    if change.base is None or not files or run.status != "completed":
        return run
    say(f"running the base version of {counted(len(files), 'changed test file')} against the head code")
    blobs = git.read_blobs([f"{change.base}:{f.old_path}" for f in files])
    overlay = {f.path: blobs.get(f"{change.base}:{f.old_path}", b"") for f in files}
    return replace(run, old_tests=_run(git, change.head, policy, backend, overlay))


def _run(git: Git, head: str, policy: Policy, backend: Backend, overlay: dict[str, bytes]) -> OldTestsRun:
    from verifier.testrun import harness as testrun

    paths = tuple(sorted(overlay))
    selection = Selection(whole_suite=False, files=paths, reason="the base versions of the changed test files")
    with git.exported(head, "oldtests") as tree:
        for path, data in overlay.items():
            target = tree / path
            inside = os.path.realpath(target.parent).startswith(os.path.realpath(tree) + os.sep)
            if target.is_symlink() or not target.parent.is_dir() or not inside:
                return OldTestsRun("harness-error", paths, problems=(f"{path}: cannot be written back at head",))
            target.write_bytes(data)
        prepared = testrun.prepare(tree, policy, selection)
        result = backend.run(prepared.request)
        harness_run = testrun.HarnessRun(result, prepared.key, prepared.folder, known=prepared.known)
        outcome = testrun.read_run(harness_run)
    status = outcome.status
    if status == "no-tests" and outcome.pytest_exit is not None:
        status = "completed"  # the base files hold no test that still collects: nothing to judge
    return OldTestsRun(status, paths, outcome.tests, outcome.collection_errors, outcome.problems)
