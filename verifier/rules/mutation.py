"""Rules on the mutation stage: do the tests notice when a machine-written line is wrong?"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import replace
from typing import Any

from verifier.models import Finding, MutantOutcome, MutationResult
from verifier.mutation.counts import RULE_ID
from verifier.rules import REGISTRY, RuleContext, rule
from verifier.words import counted, plural

SHOWN_TESTS = 5  # tests named in one finding; the details keep them all


@rule(
    RULE_ID,
    default="block",
    summary="the tests run a machine-written line but do not notice it made wrong",
    stage="mutation",
    options={"threshold": 80.0, "per_line": 3},
)
def surviving_mutants(context: RuleContext) -> Iterator[Finding]:
    """Every executable machine-written line the tests executed gets a few small faults (mutants: a
    comparison or arithmetic operator changed, a condition negated, a constant or a returned value
    replaced, a call or an update removed, a raise skipped), each run against the tests that executed
    the line. A mutant survives when all of them still pass: the tests run the line without checking
    what it does. The share of mutants killed must reach the policy's ``threshold`` (percent, default
    80); below it, each line with a survivor blocks, above it they warn. A survivor that does not change
    behaviour (an equivalent mutant) is accepted by a waiver of this rule on its file, or on its line
    written ``path:line``; accepted survivors are counted apart. Add assertions that check the results
    the line produces."""
    result = context.mutation
    if result is None:
        return
    yield from _errors(result)
    by_line: dict[tuple[str, int], list[MutantOutcome]] = {}
    for outcome in result.outcomes:
        if outcome.status == "survived":
            by_line.setdefault((outcome.mutant.path, outcome.mutant.line), []).append(outcome)
    findings = [_line_finding(path, line, survivors) for (path, line), survivors in sorted(by_line.items())]
    findings = [_line_waived(context, finding) for finding in findings]
    accepted = [f for f in findings if f.severity == "info"]
    survived = sum(len(f.details["mutants"]) for f in findings if f not in accepted)
    killed = sum(1 for outcome in result.outcomes if outcome.counts_as_killed)
    judged = killed + survived
    threshold = float(REGISTRY[RULE_ID].option(context.policy, "threshold"))
    score = None if judged == 0 else round(100.0 * killed / judged, 2)
    below = score is not None and score < threshold
    if below:
        yield Finding(
            RULE_ID,
            "block",
            f"the tests kill {killed} of {counted(judged, 'mutant')} of the machine-written lines "
            f"({score:.1f}%, the policy asks for {threshold:g}%); {survived} {plural(survived, 'survives', 'survive')}"
            + (f", {sum(len(f.details['mutants']) for f in accepted)} accepted by waivers" if accepted else ""),
            details={"killed": killed, "survived": survived, "score": score, "threshold": threshold},
        )
    for finding in findings:
        yield (
            finding
            if below or finding.severity == "info"
            else replace(finding, details={**finding.details, "max_severity": "warn"})
        )


def _errors(result: MutationResult) -> Iterator[Finding]:
    """The gate fails closed: a mutant the runner could not try leaves the change unverified."""
    failed = [outcome for outcome in result.outcomes if outcome.status == "error"]
    if result.problem or failed:
        first = result.problem or (failed[0].problem if failed else None) or "no reason given"
        yield Finding(
            RULE_ID,
            "error",
            f"{counted(len(failed), 'mutant')} could not be tried ({first}); the tests' strength is not verified",
            details={"problem": first},
        )


def _line_finding(path: str, line: int, survivors: list[MutantOutcome]) -> Finding:
    tests = sorted({test for outcome in survivors for test in outcome.tests})
    shown = ", ".join(tests[:SHOWN_TESTS])
    if len(tests) > SHOWN_TESTS:
        shown += f" and {len(tests) - SHOWN_TESTS} more"
    first = survivors[0].mutant
    more = f" (and {len(survivors) - 1} more mutants)" if len(survivors) > 1 else ""
    return Finding(
        RULE_ID,
        "block",
        f"no test noticed `{first.original.strip()}` -> `{first.mutated.strip()}`{more}; ran by {shown}",
        path=path,
        line=line,
        details={
            "mutants": [
                {"operator": o.mutant.operator, "original": o.mutant.original, "mutated": o.mutant.mutated}
                for o in survivors
            ],
            "tests": tests,
        },
    )


def _line_waived(context: RuleContext, finding: Finding) -> Finding:
    """A waiver of this rule on the line (``<file>:<line>``) or its file accepts the line's survivors: they
    are counted apart (the verdict stage, which owns waivers, says which waiver covers the finding)."""
    record = context.waiver_of(finding) if context.waiver_of is not None else None
    if record is None:
        return finding
    details: dict[str, Any] = {**finding.details, "waived_by": dict(record), "waived_severity": "block"}
    return replace(finding, severity="info", details=details)


AT_BASE_ID = "tests.passes-at-base"


@rule(
    AT_BASE_ID,
    default="advise",
    summary="a new or changed machine-written test passes with the code as it was at base",
    stage="mutation",
    options={"inform_only": True},
)
def tests_passing_at_base(context: RuleContext) -> Iterator[Finding]:
    """When a change modifies existing code and adds or changes tests, each new or changed machine-written
    test that executed a modified file is run once more with that file as it was at the base revision (in
    the sandbox, the file's base text imported in place of its head text). A test that passes there as well
    does not show the change: it would have passed without it. Reported as info while ``inform_only`` is
    true (the default); set it to false to give the findings the rule's setting (warn, or block). Make the
    test check what the change changes: an input whose result differs at base."""
    result = context.mutation
    if result is None:
        return
    inform = bool(REGISTRY[AT_BASE_ID].option(context.policy, "inform_only"))
    for outcome in result.at_base:
        if outcome.status != "survived" or not outcome.tests:
            continue
        test = outcome.tests[0]
        yield Finding(
            AT_BASE_ID,
            "info" if inform else "block",
            f"{test} passes with {outcome.mutant.path} as it was at base: it does not show the change",
            path=test.split("::", 1)[0],
            details={"test": test, "file": outcome.mutant.path},
        )
