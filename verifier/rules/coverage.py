"""Rules on coverage: the tests must execute the machine-written lines."""

from __future__ import annotations

from collections.abc import Iterator

from verifier.models import CoverageSummary, Finding
from verifier.rules import RuleContext, rule


@rule("coverage.new-lines", default="block", summary="machine-written lines the tests never execute", stage="dynamic")
def new_line_coverage(context: RuleContext) -> Iterator[Finding]:
    """The share of executable machine-written lines that the tests executed must reach the policy's
    threshold (default 90%). Executable lines follow coverage.py's own analysis: blank lines, comments
    and docstrings do not count, and a statement spread over several lines counts once (at its first
    line). Every uncovered line is listed. Add tests that execute these lines, or remove dead code."""
    summary = context.coverage
    if summary is None:
        return
    yield from _separate_targets(summary)
    if summary.percent is None or summary.percent >= summary.threshold:
        return
    total = sum(len(lines) for lines in summary.uncovered.values())
    yield Finding(
        "coverage.new-lines",
        "block",
        f"the tests execute {summary.covered} of {summary.executable} executable machine-written lines "
        f"({summary.percent:.1f}%, the policy asks for {summary.threshold:g}%); {total} uncovered",
    )
    for path, lines in summary.uncovered.items():
        for line in lines:
            yield Finding(
                "coverage.new-lines", "block", "machine-written line never executed by the tests", path=path, line=line
            )


def _separate_targets(summary: CoverageSummary) -> Iterator[Finding]:
    """Files a per-path override gives their own threshold, each judged alone (the finding has its path,
    so the override's own setting for this rule applies to it)."""
    for target in summary.separate:
        if target.percent is None or target.percent >= target.threshold:
            continue
        yield Finding(
            "coverage.new-lines",
            "block",
            f"the tests execute {target.covered} of {target.executable} executable machine-written lines of this "
            f"file ({target.percent:.1f}%, its path override asks for {target.threshold:g}%)",
            path=target.path,
        )
        for line in target.uncovered:
            yield Finding(
                "coverage.new-lines",
                "block",
                "machine-written line never executed by the tests",
                path=target.path,
                line=line,
            )
