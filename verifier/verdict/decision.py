"""The decision: judged findings become pass, warn, block or error, and the verdict an exit code.

A block finding blocks. Otherwise an error (the gate could not verify) makes the verdict ``error``,
which never counts as a pass. Warnings make ``warn``; anything else passes. One part of a split run
ends with ``part`` (:func:`decide_part`).
"""

from __future__ import annotations

from collections.abc import Iterable

from verifier.errors import ExitCode
from verifier.models import Finding, Verdict

EXIT_CODES: dict[Verdict, ExitCode] = {
    "pass": ExitCode.PASS,
    "warn": ExitCode.PASS,
    "block": ExitCode.BLOCK,
    "error": ExitCode.UNVERIFIED,
    "part": ExitCode.PART_DONE,
}
_BY_WEIGHT: tuple[tuple[str, Verdict], ...] = (("block", "block"), ("error", "error"), ("warn", "warn"))


def decide(findings: Iterable[Finding]) -> Verdict:
    severities = {finding.severity for finding in findings}
    for severity, verdict in _BY_WEIGHT:
        if severity in severities:
            return verdict
    return "pass"


def decide_part(findings: Iterable[Finding]) -> Verdict:
    """The outcome of one part of a split run (``check --part K/N``): coverage, mutants and the other
    findings of the run are judged over every part's tests, so a part has no verdict of its own (``part``)
    unless it could not run its share (``error``): ``verifier join`` of all the parts gives the verdict."""
    verdict = decide(findings)
    return "error" if verdict == "error" else "part"


def exit_code(verdict: Verdict) -> ExitCode:
    """The exit code of a check that ended with ``verdict``."""
    return EXIT_CODES[verdict]
