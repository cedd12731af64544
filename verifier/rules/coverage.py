"""Rules on coverage: the tests must execute the machine-written lines."""

from __future__ import annotations

import re
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


# Excluded machine lines that hide nothing: an ``if TYPE_CHECKING:`` header, imports, stub bodies, blanks.
_HARMLESS_EXCLUDED = re.compile(r"^\s*(#.*|if (typing\.)?TYPE_CHECKING:.*|(from\s+\S+\s+)?import\s.*|\.\.\.|pass|)\s*$")


@rule(
    "coverage.excluded",
    default="block",
    summary="machine-written lines that coverage.py's exclusions hide from measurement",
    stage="dynamic",
    sources=("coverage.py documentation: excluding code (the default exclusions)",),
)
def excluded_lines(context: RuleContext) -> Iterator[Finding]:
    """coverage.py does not measure excluded lines: those with its pragma, stub bodies, the body of an
    ``if TYPE_CHECKING:`` block (also when a module sets ``TYPE_CHECKING = True`` itself). Machine-written
    code there would count neither as covered nor as missing, so it is reported instead of dropped. Only
    code is reported: imports, ``...``, ``pass``, comments and the ``if TYPE_CHECKING:`` line itself hide
    nothing. Move the code out of the excluded block and test it."""
    summary = context.coverage
    if summary is None:
        return
    for path, lines in summary.excluded.items():
        rows = context.head_sources.get(path, "").split("\n")
        for line in lines:
            text = rows[line - 1] if 0 < line <= len(rows) else ""
            if not _HARMLESS_EXCLUDED.match(text):
                yield Finding(
                    "coverage.excluded",
                    "block",
                    "machine-written line excluded from coverage measurement (coverage.py's exclusions)",
                    path=path,
                    line=line,
                )


@rule(
    "coverage.branches",
    default="block",
    summary="machine-written branches the tests never take",
    stage="dynamic",
    sources=("coverage.py documentation: branch coverage (arcs, partial branches)",),
)
def partial_branches(context: RuleContext) -> Iterator[Finding]:
    """The tests run under coverage.py's branch measurement. A machine-written line that decides where
    the code goes next (an ``if``, a loop, a ``match``) must have each of its ways taken by some test: a
    line executed with a way never taken is a partial branch, listed with the line numbers it never went
    to (-1 or another negative number: leaving the function). Add the test that takes the other way."""
    summary = context.coverage
    if summary is None:
        return
    for path, branches in summary.partial_branches.items():
        for line, missed in branches.items():
            where = ", ".join("exit" if target < 0 else f"line {target}" for target in missed)
            yield Finding(
                "coverage.branches",
                "block",
                f"partial branch: the tests never go from here to {where}",
                path=path,
                line=line,
                details={"missed": list(missed)},
            )
