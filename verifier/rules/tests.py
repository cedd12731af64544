"""Rules on the outcome of the test run: the tests must pass, and the run must be complete."""

from __future__ import annotations

from collections.abc import Iterator

from verifier.models import INDEX, RUN_STATUS_TEXT, Finding
from verifier.pathglob import PYTEST_FILES
from verifier.rules import RuleContext, rule
from verifier.testrun.differential import classify
from verifier.words import counted


@rule(
    "tests.failing",
    default="block",
    summary="a test fails at head",
    stage="dynamic",
    options={"block_pre_existing": False},
)
def failing_tests(context: RuleContext) -> Iterator[Finding]:
    """Every test that ran must pass. A failure or an error in setup or teardown at the head of the
    change is listed by its pytest node id with the first line of its message. Fix the code (or, if the
    test was wrong, the test, in a human-reviewed change) and run the gate again. When a test fails, the
    gate also runs the tests at the base revision: a test that fails there too is reported as
    pre-existing and does not block a change that did not cause it (it warns), unless the policy sets
    option ``block_pre_existing: true``."""
    run = context.run
    if run is None:
        return
    for test in run.tests:
        if test.outcome in ("failed", "error"):
            path = test.node_id.split("::", 1)[0]
            at_base = None if run.baseline is None else run.baseline.get(test.node_id)
            old = at_base is not None and classify(at_base, test.outcome) == "still-failing"
            yield Finding(
                "tests.failing",
                "block",
                f"{test.node_id} {test.outcome}{' (pre-existing: it fails at base too)' if old else ''}: "
                f"{_gist(test.message)}",
                path=path,
                details={"message": test.message, **({"pre_existing": True, "at_base": at_base} if old else {})},
            )


GIST_CAP = 200  # characters of a failure's gist in a finding's message (the whole text is in its details)


def _gist(message: str) -> str:
    """What went wrong, in one capped line: pytest's first ``E`` line, led by the failing ``assert``
    statement (the ``>`` line above it) when the error is an assertion, so a bare ``AssertionError`` (an
    assert pytest did not rewrite, in a helper module) still shows what was asserted; else the last line."""
    lines = [line.strip() for line in message.splitlines() if line.strip()]
    first_error = next((index for index, line in enumerate(lines) if line.startswith("E ")), None)
    if first_error is None:
        return _capped(lines[-1] if lines else "no message")
    error = lines[first_error][1:].strip()
    statement = next((line[1:].strip() for line in reversed(lines[:first_error]) if line.startswith(">")), "")
    if statement.startswith("assert ") and error.startswith(("AssertionError", "assert ")):
        return _capped(statement if error in ("AssertionError", statement) else f"{statement} ({error})")
    return _capped(error)


def _capped(text: str) -> str:
    return text if len(text) <= GIST_CAP else text[: GIST_CAP - 1] + "…"


@rule("run.incomplete", default="block", summary="the tests could not be run to the end", stage="dynamic", fixed=True)
def incomplete_run(context: RuleContext) -> Iterator[Finding]:
    """The gate verifies only what it saw run. A timeout, a crash, a collection error or an empty test
    run means the change was not verified; the gate says so and exits 3, never passing by default. The
    message names what happened; the sandbox's output tail is in the report's details."""
    run = context.run
    if run is None or run.status == "completed":
        return
    if run.status == "no-tests":
        yield Finding("run.incomplete", "error", _no_tests(context), details={"status": run.status})
        return
    detail = RUN_STATUS_TEXT[run.status]
    if run.limit_hit:
        detail += f" (limit reached: {run.limit_hit})"
    for error in run.collection_errors[:10]:
        yield Finding("run.incomplete", "error", f"collection error: {error}")
    for problem in run.problems[:20]:
        yield Finding("run.incomplete", "error", f"cannot verify: {problem}")
    if len(run.problems) > 20:
        yield Finding("run.incomplete", "error", f"cannot verify: {counted(len(run.problems) - 20, 'more problem')}")
    yield Finding("run.incomplete", "error", detail, details={"output_tail": run.output_tail[-4000:]})


def _no_tests(context: RuleContext) -> str:
    """One message for a run that collected nothing: where pytest looked, what cannot be verified, what to do."""
    head = context.change.head
    revision = "the index" if head == INDEX else head[:12]
    paths = context.policy.test_paths
    looked = (
        f"the policy's tests.paths ({', '.join(paths)})"
        if paths
        else "the repository, or its pytest configuration's testpaths"
    )
    machine = context.provenance.machine_lines
    return (
        f"no tests were collected at {revision} (pytest looked in {looked}): the "
        f"{counted(context.provenance.machine_line_count, 'machine-written line')} in {counted(len(machine), 'file')} "
        f"cannot be verified; add tests (pytest collects {' and '.join(PYTEST_FILES)} files), or point the "
        "policy's tests.paths in verifier.yaml at the folders that hold them"
    )


@rule(
    "tests.flaky-machine",
    default="block",
    summary="a test that executes machine-written lines failed, then passed on a re-run",
    stage="dynamic",
)
def flaky_on_machine_code(context: RuleContext) -> Iterator[Finding]:
    """A failure of a test that executes machine-written lines is a failure, even when a re-run passes:
    code can fail on purpose now and then (on a clock, a counter, a random draw) and pass when run again.
    The re-run starts exactly like the first run, so the code cannot tell them apart. Only a policy that
    sets ``selection.allow_flaky: true`` lets such a test pass on a re-run (it is then reported by
    ``tests.flaky`` like any flaky test). Find out why the test failed."""
    run = context.run
    if run is None or context.policy.selection.allow_flaky:
        return
    flaky = {test.node_id: test for test in run.tests if test.outcome == "flaky"}
    if not flaky:
        return
    for node_id, paths in _machine_lines_run_by(context, set(flaky)).items():
        test = flaky[node_id]
        yield Finding(
            "tests.flaky-machine",
            "block",
            f"{node_id} executes machine-written lines ({', '.join(sorted(paths))}) and failed once "
            f"before passing ({test.attempts} runs): {_gist(test.message)}",
            path=node_id.split("::", 1)[0],
            details={"attempts": test.attempts, "message": test.message},
        )


def _machine_lines_run_by(context: RuleContext, node_ids: set[str]) -> dict[str, set[str]]:
    """node id -> the files whose machine-written lines it executed (coverage contexts of the run);
    a flaky test whose own file is machine-written counts too."""
    found: dict[str, set[str]] = {}
    run = context.run
    if run is None:
        return found
    for path, lines in context.provenance.machine_lines.items():
        measured = run.coverage.get(path)
        for node_id in node_ids:
            if node_id.split("::", 1)[0] == path:
                found.setdefault(node_id, set()).add(path)
        if measured is None:
            continue
        for line in lines:
            for label in measured.contexts.get(line, ()):
                if label in node_ids:
                    found.setdefault(label, set()).add(path)
    return found
