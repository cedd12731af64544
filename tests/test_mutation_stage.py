"""The mutation stage's host side on data: which tests run a mutant, the rule's score and findings,
waivers, failing closed, and joining shards."""

from __future__ import annotations

from dataclasses import replace

from verifier import models
from verifier.models import (
    Change,
    FileCoverage,
    Mutant,
    MutantOutcome,
    MutationResult,
    Policy,
    Provenance,
    RunResult,
    Waiver,
)
from verifier.mutation.join import joined_mutation
from verifier.mutation.stage import covering_tests, time_limit
from verifier.rules import RuleContext
from verifier.rules.mutation import RULE_ID
from verifier.verdict.judge import apply_rules
from verifier.verdict.waivers import waived_by

FN = Mutant("shop/price.py", 4, 4, "compare", "    if a < b:", "    if a <= b:", "discount", (4,))
MODULE = Mutant("shop/price.py", 1, 1, "constant", "RATE = 3", "RATE = 0", None, (1,))


def run_with(contexts: dict[int, tuple[str, ...]], executed: set[int] | None = None) -> RunResult:
    tests = (
        models.TestOutcome("t.py::test_fast", "passed", duration=0.01),
        models.TestOutcome("t.py::test_slow", "passed", duration=0.5),
        models.TestOutcome("t.py::test_broken", "failed", duration=0.1),
        models.TestOutcome("t.py::test_uses_db", "passed", duration=0.2, fixtures=("db",)),
    )
    coverage = FileCoverage("shop/price.py", frozenset(executed or contexts), frozenset(), contexts=contexts)
    return RunResult("completed", "process", "", 0, tests, {"shop/price.py": coverage})


def test_tests_are_those_that_ran_the_line_passing_only_fastest_first() -> None:
    run = run_with({4: ("t.py::test_slow", "t.py::test_fast", "t.py::test_broken"), 9: ("t.py::test_uses_db",)})
    assert covering_tests(run, FN) == ("t.py::test_fast", "t.py::test_slow")


def test_a_fixture_context_stands_for_every_test_using_it_and_phase_suffixes_name_the_test() -> None:
    run = run_with({4: ("fixture:db", "t.py::test_fast|run")})
    assert covering_tests(run, FN) == ("t.py::test_fast", "t.py::test_uses_db")


def test_module_level_lines_run_every_passing_test_and_unknown_contexts_run_all() -> None:
    run = run_with({1: ("",), 4: ("t.py::test_fast",)})
    # a module-level line runs at import, under whichever test imported first: a test that only reads the
    # constant it makes executes none of the file's lines, so every passing test runs such a mutant
    assert covering_tests(run, MODULE) == ("t.py::test_fast", "t.py::test_uses_db", "t.py::test_slow")
    no_contexts = run_with({}, executed={4})
    assert covering_tests(no_contexts, FN) == ("t.py::test_fast", "t.py::test_uses_db", "t.py::test_slow")
    assert covering_tests(run_with({}, executed=set()), FN) == ()  # never executed: not run
    # executed by a failing test only: not run (the other tests never reach it; tests.failing reports the failure)
    assert covering_tests(run_with({4: ("t.py::test_broken",)}), FN) == ()


def test_time_limit_has_a_floor_and_grows_with_the_tests() -> None:
    durations = {"a": 1.0, "b": 2.0}
    assert time_limit(FN, (), durations) >= 1.0
    assert time_limit(FN, ("a", "b"), durations) > time_limit(FN, ("a",), durations)
    assert time_limit(MODULE, ("a",), durations) > time_limit(FN, ("a",), durations)  # a fresh interpreter


def outcome(line: int, status: str, tests: tuple[str, ...] = ("t.py::test_fast",)) -> MutantOutcome:
    mutant = replace(FN, line=line, end_line=line, original=f"    x = {line}", mutated=f"    x = {line + 1}")
    return MutantOutcome(mutant, status, tests)  # type: ignore[arg-type]


def judge(result: MutationResult, policy: Policy | None = None) -> list:
    change = Change("HEAD", "commit", "a" * 40, "b" * 40, (), ())
    provenance = Provenance({"shop/price.py": (1, 2, 3, 4, 5)}, {}, {})
    policy = policy or Policy(source="test")
    context = RuleContext(change, provenance, policy, mutation=result, waiver_of=waived_by(policy))
    return apply_rules("mutation", context)


def test_below_the_threshold_survivor_lines_block_with_before_after_and_tests() -> None:
    result = MutationResult(
        (outcome(2, "killed"), outcome(3, "survived"), outcome(3, "survived"), outcome(4, "timeout"))
    )
    findings = judge(result)
    assert findings[0].line is None and findings[0].severity == "block" and "2 of 4" in findings[0].message
    [line] = findings[1:]
    assert (line.path, line.line, line.severity) == ("shop/price.py", 3, "block")
    assert "`x = 3` -> `x = 4`" in line.message and "t.py::test_fast" in line.message
    assert len(line.details["mutants"]) == 2


def test_at_or_above_the_threshold_survivors_warn() -> None:
    result = MutationResult((*tuple(outcome(n, "killed") for n in range(1, 5)), outcome(5, "survived")))
    findings = judge(result)  # 4 of 5 = 80% meets the default 80%
    assert [(f.line, f.severity) for f in findings] == [(5, "warn")]
    strict = Policy(source="test", rule_options={RULE_ID: {"threshold": 90.0}})
    assert next((f.line, f.severity) for f in judge(result, strict)) == (None, "block")


def test_waivers_on_a_line_or_a_file_accept_survivors_apart_from_the_score() -> None:
    result = MutationResult((outcome(2, "killed"), outcome(3, "survived"), outcome(4, "survived")))
    on_line = Waiver(RULE_ID, "shop/price.py:3", "equivalent: 3 and 4 round alike", "ada.okafor", "2099-12-31", "x:1")
    findings = judge(result, Policy(source="test", waivers=(on_line,)))
    by_line = {f.line: f for f in findings}
    assert by_line[3].severity == "info" and by_line[3].details["waived_by"]["path"] == "shop/price.py:3"
    assert by_line[4].severity == "block"
    assert "1 of 2" in by_line[None].message and "1 accepted" in by_line[None].message  # the waived one is not judged
    on_file = replace(on_line, path="shop/*.py")
    findings = judge(result, Policy(source="test", waivers=(on_file,)))
    assert {f.severity for f in findings} == {"info"}  # 1 of 1 judged is killed: no score finding


def test_a_mutant_that_could_not_be_tried_is_an_error_never_a_pass() -> None:
    failed = replace(outcome(2, "error"), problem="the runner ended before trying it")
    findings = judge(MutationResult((outcome(1, "killed"), failed)))
    assert [f.severity for f in findings] == ["error"] and "could not be tried" in findings[0].message
    assert judge(MutationResult((), problem="the mutation runner wrote no results"))[0].severity == "error"


def test_joined_shards_kill_when_any_shard_kills_and_join_the_tests() -> None:
    def entry(line: int, status: str, tests: list[str]) -> dict:
        return {"path": "p.py", "line": line, "status": status, "original": "a", "mutated": "b", "tests": tests}

    first = {"mutation": {}, "mutants": [entry(1, "survived", ["t::a"]), entry(2, "not-run", []), entry(3, "x", [])]}
    second = {"mutation": {}, "mutants": [entry(1, "killed", ["t::b"]), entry(2, "survived", ["t::c"])]}
    joined = joined_mutation([first, second])
    assert joined is not None
    assert [(o.mutant.line, o.status, o.tests) for o in joined.outcomes] == [
        (1, "killed", ("t::a", "t::b")),
        (2, "survived", ("t::c",)),
    ]
    assert joined_mutation([{"mutants": []}]) is None  # the shards did not run the stage
