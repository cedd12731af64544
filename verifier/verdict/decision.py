"""The verdict stage: findings become pass, warn, block or error.

A block finding blocks. Otherwise an error (the gate could not verify) makes the verdict ``error``,
which never counts as a pass. Warnings make ``warn``; anything else passes.
"""

from __future__ import annotations

from collections.abc import Iterable

from verifier.errors import EXIT_BLOCK, EXIT_PASS, EXIT_UNVERIFIED
from verifier.models import Finding, Verdict

EXIT_CODES: dict[Verdict, int] = {"pass": EXIT_PASS, "warn": EXIT_PASS, "block": EXIT_BLOCK, "error": EXIT_UNVERIFIED}


def decide(findings: Iterable[Finding]) -> Verdict:
    severities = {finding.severity for finding in findings}
    for severity, verdict in (("block", "block"), ("error", "error"), ("warn", "warn")):
        if severity in severities:
            return verdict  # type: ignore[return-value]
    return "pass"
