"""Size bounds on a report, applied once, before any format is written (the sandbox's output is hostile).

One test can produce thousands of failing records; each format would copy them whole (a git note is
pushed to the remote). :func:`bounded` keeps a fixed number of findings in detail (:data:`MAX_PER_RULE`
per rule, :data:`MAX_FINDINGS` in all), shortens each message (:data:`MAX_MESSAGE_CHARS`, marked where it
was cut) and each failing test's report, and adds one ``report.left-out`` finding (severity info) that
counts, per rule, what it left out. Counts stay exact in every format (:func:`rule_counts`).

The verdict never changes because of a cap: the verdict is decided before, and at least one finding of
each (rule, severity, file, commit that introduced its line) is kept whatever the caps, so that a git
note's per-commit verdict, decided from the kept findings, is the one the full list gives. That
guarantee can keep more than :data:`MAX_FINDINGS` when many files and commits have findings.

Names are data too: a path git gives that is not UTF-8 is held with surrogate escapes; :func:`valid_text`
writes those bytes as ``\\xNN`` so that every format can be encoded (the text views escape them the same
way, see :func:`verifier.report.text.printable`).
"""

from __future__ import annotations

import dataclasses
import re
from collections import Counter
from collections.abc import Iterable, Mapping
from typing import Any

from verifier.models import Finding, Report, RunResult, TestOutcome

MAX_PER_RULE = 25  # findings of one rule kept in detail
MAX_FINDINGS = 200  # findings kept in detail in all (the summary finding aside)
MAX_MESSAGE_CHARS = 1000  # characters of a finding's message
MAX_DETAIL_CHARS = 2000  # characters of each text in a finding's details (a pytest report, an output tail)
MAX_TEST_REPORTS = 10  # failing tests whose pytest report (message) is kept; the others get a marker
MAX_TEST_MESSAGE_CHARS = 2000  # characters of each kept pytest report
MAX_LISTED_TESTS = 500  # tests listed one by one in the JSON, SARIF and Markdown lists (counts stay exact)
LEFT_OUT_RULE = "report.left-out"
LEFT_OUT_REPORT = f"[left out: over the cap of {MAX_TEST_REPORTS} kept reports]"

_SEVERITY_ORDER = {"error": 0, "block": 1, "warn": 2, "info": 3}
_SURROGATE = re.compile("[\ud800-\udfff]")


def bounded(report: Report) -> Report:
    """``report`` within the caps (the same report when it is within them already)."""
    if any(f.rule == LEFT_OUT_RULE for f in report.findings):
        return report  # bounded already
    kept = _kept(report)
    findings = [_short_finding(f) for index, f in enumerate(report.findings) if index in kept]
    left_out = Counter(f.rule for index, f in enumerate(report.findings) if index not in kept)
    if left_out:
        findings.append(_left_out_finding(report.findings, left_out))
    run = _short_run(report.run) if report.run is not None else None
    return dataclasses.replace(report, findings=tuple(findings), run=run)


def rule_counts(report: Report) -> dict[str, int]:
    """How many findings each rule made, exact whatever :func:`bounded` left out (the summary not counted)."""
    counts = Counter(f.rule for f in report.findings if f.rule != LEFT_OUT_RULE)
    for finding in report.findings:
        if finding.rule == LEFT_OUT_RULE:
            counts.update({str(rule): int(n) for rule, n in dict(finding.details.get("left_out", {})).items()})
    return dict(sorted(counts.items()))


def finding_count(report: Report) -> int:
    """Every finding the rules made (exact), the summary of what was left out not counted."""
    return sum(rule_counts(report).values())


def shortened(text: str, limit: int, from_end: bool = False) -> str:
    """``text`` cut to ``limit`` characters, with a marker saying how much was cut (``from_end``: the last
    characters are kept, for an output tail)."""
    if len(text) <= limit:
        return text
    if from_end:
        return f"[{len(text) - limit} earlier characters left out] … {text[-limit:]}"
    return f"{text[:limit]} … [{len(text) - limit} more characters left out]"


def valid_text(value: Any) -> Any:
    """``value`` (plain data: dicts, lists, strings) with the undecodable bytes of a name, held as surrogate
    escapes (PEP 383), written ``\\xNN``, and any other lone surrogate (a test's message can hold one)
    written ``\\udNNN``: valid Unicode that any encoder accepts."""
    if isinstance(value, str):
        return _SURROGATE.sub(lambda match: surrogate_escape(match.group(0)), value)
    if isinstance(value, Mapping):
        return {valid_text(key): valid_text(item) for key, item in value.items()}
    if isinstance(value, (list, tuple)):
        return [valid_text(item) for item in value]
    return value


def surrogate_escape(char: str) -> str:
    """A lone surrogate as text: ``\\xNN`` for the byte a surrogate escape holds, else ``\\udNNN``."""
    code = ord(char)
    return f"\\x{code - 0xDC00:02x}" if 0xDC80 <= code <= 0xDCFF else f"\\u{code:04x}"


# -- which findings stay in detail --------------------------------------------------------------------------


def _kept(report: Report) -> set[int]:
    """Indexes of the findings kept: one of each verdict-bearing kind first, then the most severe up to the caps."""
    line_commits = report.provenance.line_commits
    kept: set[int] = set()
    kinds: set[tuple[str, str, str | None, str | None]] = set()
    for index, finding in enumerate(report.findings):
        owner = line_commits.get(finding.path, {}).get(finding.line) if finding.path and finding.line else None
        kind = (finding.rule, finding.severity, finding.path, owner)
        if kind not in kinds:
            kinds.add(kind)
            kept.add(index)
    per_rule = Counter(report.findings[index].rule for index in kept)
    by_weight = sorted(range(len(report.findings)), key=lambda i: _SEVERITY_ORDER.get(report.findings[i].severity, 0))
    for index in by_weight:
        rule = report.findings[index].rule
        if index in kept or len(kept) >= MAX_FINDINGS or per_rule[rule] >= MAX_PER_RULE:
            continue
        kept.add(index)
        per_rule[rule] += 1
    return kept


def _left_out_finding(findings: Iterable[Finding], left_out: Counter[str]) -> Finding:
    totals = Counter(f.rule for f in findings)
    listed = ", ".join(f"{rule} {left_out[rule]} of {totals[rule]}" for rule in sorted(left_out))
    message = (
        f"{sum(left_out.values())} of {sum(totals.values())} findings are counted but not shown in detail "
        f"(caps: {MAX_PER_RULE} per rule, {MAX_FINDINGS} in all): {listed}"
    )
    details = {
        "left_out": dict(sorted(left_out.items())),
        "counts": dict(sorted(totals.items())),
        "caps": {"per_rule": MAX_PER_RULE, "findings": MAX_FINDINGS, "message_chars": MAX_MESSAGE_CHARS},
    }
    return Finding(LEFT_OUT_RULE, "info", message, details=details)


def _short_finding(finding: Finding) -> Finding:
    message = shortened(finding.message, MAX_MESSAGE_CHARS)
    details = _short_details(finding.details)
    if message == finding.message and details == finding.details:
        return finding
    return dataclasses.replace(finding, message=message, details=details)


def _short_details(value: Any, key: str = "") -> Any:
    if isinstance(value, str):
        return shortened(value, MAX_DETAIL_CHARS, from_end=key.endswith("tail"))
    if isinstance(value, Mapping):
        return {name: _short_details(item, str(name)) for name, item in value.items()}
    if isinstance(value, (list, tuple)):
        return type(value)(_short_details(item) for item in value)
    return value


# -- the run's own records -------------------------------------------------------------------------------


def _short_run(run: RunResult) -> RunResult:
    reports_left = MAX_TEST_REPORTS
    tests: list[TestOutcome] = []
    for test in run.tests:
        message = test.message
        if test.outcome in ("failed", "error"):
            if reports_left > 0:
                reports_left -= 1
            elif message:
                message = LEFT_OUT_REPORT
        message = shortened(message, MAX_TEST_MESSAGE_CHARS)
        tests.append(test if message == test.message else dataclasses.replace(test, message=message))
    errors = tuple(shortened(error, MAX_MESSAGE_CHARS) for error in run.collection_errors[:MAX_FINDINGS])
    if len(run.collection_errors) > MAX_FINDINGS:
        errors += (f"[{len(run.collection_errors) - MAX_FINDINGS} more collection errors left out]",)
    return dataclasses.replace(
        run,
        tests=tuple(tests),
        collection_errors=errors,
        output_tail=run.output_tail[-MAX_DETAIL_CHARS:],
        problems=tuple(shortened(problem, MAX_MESSAGE_CHARS) for problem in run.problems),
    )
