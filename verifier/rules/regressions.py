"""Rules on what the change did to the tests: regressions (against a differential run) and flaky tests."""

from __future__ import annotations

from collections.abc import Iterator

from verifier.models import Finding
from verifier.rules import RuleContext, rule
from verifier.rules.tests import _gist
from verifier.testrun.differential import classify, regressions


@rule(
    "tests.broken", default="block", summary="a test the change breaks (passed at base, fails at head)", stage="dynamic"
)
def broken_tests(context: RuleContext) -> Iterator[Finding]:
    """For a repository whose main branch already has failing tests: with the policy's
    ``selection.differential: true``, the selected tests also run at the base revision, and this rule
    blocks only the failures the change is answerable for, a test that passed at base and fails at head
    (broken) or a new test that fails; a test that already failed at base (still failing) is not held
    against the change. Set ``tests.failing: ignore`` to block regressions only. Without a differential run
    this rule stays silent while ``tests.failing`` is on, and otherwise counts every failure (no failure
    can be shown to be old)."""
    run = context.run
    if run is None:
        return
    differential = run.baseline is not None and context.policy.selection.differential
    if not differential and context.policy.setting("tests.failing", "block") != "ignore":
        return  # tests.failing reports the failures (with the base outcomes of a failing run, when known)
    for test in regressions(run.tests, run.baseline):
        kind = classify(run.baseline.get(test.node_id), test.outcome) if run.baseline is not None else "unknown"
        why = {
            "broken": "passed at base, fails at head",
            "new": "a new test that fails",
            "unknown": "no baseline to compare with",
        }[kind]
        yield Finding(
            "tests.broken",
            "block",
            f"{test.node_id} {test.outcome} ({why}): {_gist(test.message)}",
            path=test.node_id.split("::", 1)[0],
            details={"class": kind, "message": test.message},
        )


@rule("tests.flaky", default="advise", summary="a test failed, then passed when run again", stage="dynamic")
def flaky_tests(context: RuleContext) -> Iterator[Finding]:
    """A failing test runs again up to ``selection.reruns`` times before it counts as failing. One that
    passes on a re-run is flaky: it does not block as a failure, and it is not hidden either; this rule
    names it with its first failure, so that someone fixes the test (or the code) before it hides a real
    failure."""
    run = context.run
    if run is None:
        return
    for test in run.tests:
        if test.outcome == "flaky":
            yield Finding(
                "tests.flaky",
                "warn",
                f"{test.node_id} is flaky: failed, then passed on re-run ({test.attempts} runs): {_gist(test.message)}",
                path=test.node_id.split("::", 1)[0],
                details={"attempts": test.attempts, "message": test.message},
            )
