"""The differential run: the selected tests at base as well as at head, and what the change did to each.

Each test that ran at head is classified against its outcome at base: ``fixed`` (failed at base, passes
now), ``broken`` (passed at base, fails now), ``still-failing`` (fails at both), ``new`` (absent at base),
or ``unchanged``. Flaky outcomes count as passing on their side: they did pass on a re-run.

The base outcomes come from the who-tests-what map when one was used (it is a whole-suite run at base),
else from the test census when one was taken (:mod:`verifier.testrun.census`: the base outcomes of every
test the head run was asked for), else from a run of the same tests at base, cached (:mod:`verifier.cache`,
kind ``baseline``) by base tree, environment and the tests asked for. A base run that cannot be read leaves
the baseline unknown (``None``): then no failure can be shown to be old, and the regression rule counts
every failure.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Mapping
from dataclasses import replace
from pathlib import Path
from typing import TYPE_CHECKING

from verifier import cache
from verifier.models import Change, Policy, RunResult, Selection, TestOutcome
from verifier.selection import impactmap
from verifier.selection.impactmap import ImpactMap
from verifier.words import counted

if TYPE_CHECKING:
    from verifier.gitio import Git
    from verifier.sandbox import Backend

FAILING = ("failed", "error")
CLASSES = ("broken", "fixed", "still-failing", "new", "unchanged")


def classify(base_outcome: str | None, head_outcome: str) -> str:
    """One test's class, from its outcome at base (None: it did not exist there) and at head."""
    if base_outcome is None:
        return "new"
    failed_before, fails_now = base_outcome in FAILING, head_outcome in FAILING
    if failed_before and fails_now:
        return "still-failing"
    if fails_now:
        return "broken"
    if failed_before:
        return "fixed"
    return "unchanged"


def classify_run(tests: tuple[TestOutcome, ...], baseline: Mapping[str, str]) -> dict[str, str]:
    """node id -> class, for every test that ran at head."""
    return {test.node_id: classify(baseline.get(test.node_id), test.outcome) for test in tests}


def regressions(tests: tuple[TestOutcome, ...], baseline: Mapping[str, str] | None) -> list[TestOutcome]:
    """The failures the change is answerable for: broken tests and new tests that fail (all failures when
    the baseline is unknown)."""
    failing = [test for test in tests if test.outcome in FAILING]
    if baseline is None:
        return failing
    return [test for test in failing if classify(baseline.get(test.node_id), test.outcome) in ("broken", "new")]


def with_baseline(
    git: Git,
    change: Change,
    policy: Policy,
    selection: Selection,
    run: RunResult,
    backend: Backend,
    impact: ImpactMap | None,
    say: Callable[[str], None] = lambda _message: None,
) -> RunResult:
    """``run`` with the base outcomes of its tests (``baseline``); unknown (None) when base could not run."""
    if change.base is None:
        return replace(run, baseline={})
    wanted = sorted(test.node_id for test in run.tests)
    tree = impactmap.tree_of(git, change.base)
    if impact is not None and impact.tree == tree:
        return replace(run, baseline={test: impact.outcomes[test] for test in wanted if test in impact.outcomes})
    if run.census is not None:
        # the census ran at base every test this run was asked for: a test it does not list is new
        return replace(run, baseline={test: run.census[test] for test in wanted if test in run.census})
    environment = impactmap.environment_key(policy, backend)
    target = _cache_file(git, tree, environment, wanted)
    cached = _load(target)
    if cached is not None:
        return replace(run, baseline=cached)
    say(f"running the {counted(len(wanted), 'test')} at base for the differential run")
    baseline = _run_at_base(git, change.base, policy, selection, backend, wanted)
    if baseline is not None:
        _store(target, baseline)
    return replace(run, baseline=baseline)


def _run_at_base(
    git: Git, base: str, policy: Policy, selection: Selection, backend: Backend, wanted: list[str]
) -> dict[str, str] | None:
    from verifier.testrun import harness as testrun

    if not wanted:
        return {}
    at_base = Selection(whole_suite=False, node_ids=tuple(wanted), reason="the differential run at base")
    result = testrun.read_run(testrun.run_revision(git, base, policy, at_base, backend))
    if result.status == "no-tests":
        return {}  # none of the tests exists at base: they are all new
    if result.status != "completed":
        return None
    return {test.node_id: test.outcome for test in result.tests}


def _cache_file(git: Git, tree: str, environment: str, wanted: list[str]) -> Path:
    digest = hashlib.sha256("\n".join(wanted).encode()).hexdigest()[:24]
    return cache.folder(git, "baseline") / f"{tree}-{environment}-{digest}.json"


def _load(path: Path) -> dict[str, str] | None:
    data = cache.load_json(path)
    return {str(k): str(v) for k, v in data.items()} if isinstance(data, dict) else None


def _store(path: Path, baseline: Mapping[str, str]) -> None:
    cache.save_json(path, dict(baseline))
