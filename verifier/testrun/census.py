"""The test census: which tests of the base revision the head run should have run again, and their outcomes.

The census is the list of base node ids that the head run was asked to run (every base test for a whole-
suite run; else the selected node ids, the tests of the selected files) plus every base test of the test
files the change modifies, renames or deletes, each with its outcome at base. ``tests.lost``
(:mod:`verifier.rules.census`) compares it with the head run: a base test that is gone, no longer collected
or skipped at head is a finding, unless the change deleted its definition (``tests.weakened`` judges that).

The base outcomes come from the who-tests-what map when one was used (a whole-suite run at base), else from a
run of the census's files at base, cached (:mod:`verifier.cache`, kind ``census``) by base tree, environment
and the files asked for.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Mapping
from dataclasses import replace
from pathlib import Path
from typing import TYPE_CHECKING

from verifier import cache
from verifier.models import Change, Policy, RunResult, Selection
from verifier.pathglob import pytest_collects_file
from verifier.rules.machine import glob_matcher
from verifier.rules.weakened import DEFAULT_TEST_GLOBS
from verifier.selection import impactmap
from verifier.selection.impactmap import ImpactMap

if TYPE_CHECKING:
    from verifier.gitio import Git
    from verifier.sandbox import Backend

# a base run that stopped here still names the tests it ran (the broken files are named apart)
USABLE_AT_BASE = ("completed", "collection-error")


def touched_test_files(change: Change) -> tuple[str, ...]:
    """The base paths of the test files the change modifies, renames or deletes (a ``conftest.py`` holds
    fixtures and hooks, no tests: ``config.harness`` judges its changes)."""
    is_test = glob_matcher(tuple(DEFAULT_TEST_GLOBS))
    return tuple(
        sorted(
            f.old_path
            for f in change.files
            if f.old_path
            and f.old_path.endswith(".py")
            and f.old_path.rsplit("/", 1)[-1] != "conftest.py"
            and (pytest_collects_file(f.old_path) or is_test(f.old_path))
        )
    )


def with_census(
    git: Git,
    change: Change,
    selection: Selection,
    run: RunResult,
    policy: Policy,
    backend: Backend,
    impact: ImpactMap | None,
    say: Callable[[str], None] = lambda _message: None,
) -> RunResult:
    """``run`` with its census (base node id -> outcome at base); ``census_problem`` says why when none."""
    if change.base is None or run.status != "completed":
        return run
    files = _base_files(change, selection)
    tree = impactmap.tree_of(git, change.base)
    if impact is not None and impact.tree == tree:
        return replace(run, census=_from_map(impact.outcomes, selection, files))
    at_base = Selection(
        whole_suite=selection.whole_suite,
        node_ids=() if selection.whole_suite else selection.node_ids,
        files=() if selection.whole_suite else files,
        reason="the census of the base tests",
    )
    target = _cache_file(git, tree, impactmap.environment_key(policy, backend), at_base)
    cached = cache.load_json(target)
    if isinstance(cached, dict):
        return replace(run, census={str(k): str(v) for k, v in cached.items()})
    say("running the base tests for the census")
    census, problem = _run_at_base(git, change.base, policy, at_base, backend)
    if census is None:
        return replace(run, census_problem=problem)
    cache.save_json(target, census)
    return replace(run, census=census)


def _base_files(change: Change, selection: Selection) -> tuple[str, ...]:
    """The base paths of the selected files (head paths followed back through renames) and touched tests."""
    back = {f.path: f.old_path for f in change.files if f.old_path}
    selected = {back.get(path, path) for path in selection.files}
    return tuple(sorted(selected | set(touched_test_files(change))))


def _from_map(outcomes: Mapping[str, str], selection: Selection, files: tuple[str, ...]) -> dict[str, str]:
    wanted_ids, wanted_files = set(selection.node_ids), set(files)
    return {
        test: outcome
        for test, outcome in outcomes.items()
        if selection.whole_suite or test in wanted_ids or test.split("::", 1)[0] in wanted_files
    }


def _run_at_base(
    git: Git, base: str, policy: Policy, at_base: Selection, backend: Backend
) -> tuple[dict[str, str] | None, str]:
    from verifier.testrun import harness as testrun

    if not at_base.whole_suite and not at_base.node_ids and not at_base.files:
        return {}, ""
    result = testrun.read_run(testrun.run_revision(git, base, policy, at_base, backend))
    if result.status == "no-tests":
        return {}, ""
    if result.status not in USABLE_AT_BASE:
        why = "; ".join(result.problems[:3]) or result.status
        return None, f"the base tests could not be run for the census ({why})"
    return {test.node_id: test.outcome for test in result.tests}, ""


def _cache_file(git: Git, tree: str, environment: str, at_base: Selection) -> Path:
    asked = "\n".join(["whole" if at_base.whole_suite else "part", *at_base.node_ids, "--", *at_base.files])
    digest = hashlib.sha256(asked.encode()).hexdigest()[:24]
    return cache.folder(git, "census") / f"{tree}-{environment}-{digest}.json"
