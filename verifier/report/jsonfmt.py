"""The JSON report: a versioned format that tools read; fields may be added, never change meaning.

FORMAT_VERSION history (one line per version):
  1: verdict, base, head, sandbox, machine_lines, tests, coverage, findings (plus commits, policy, notes).
"""

from __future__ import annotations

import json
from typing import Any

from verifier.models import Report, to_plain

FORMAT_VERSION = 1


def as_dict(report: Report) -> dict[str, Any]:
    run, coverage = report.run, report.coverage
    return {
        "format": FORMAT_VERSION,
        "verdict": report.verdict,
        "spec": report.change.spec,
        "base": report.change.base,
        "head": report.change.head,
        "sandbox": run.backend if run else None,
        "isolation": run.isolation if run else None,
        "policy": report.policy_source,
        "commits": [
            {"sha": c.sha, "author": c.author, "agent": m.agent if (m := report.provenance.marks.get(c.sha)) else None}
            for c in report.change.commits
        ],
        "machine_lines": {path: list(lines) for path, lines in report.provenance.machine_lines.items()},
        "tests": _tests(report),
        "coverage": {
            "executable": coverage.executable if coverage else 0,
            "covered": coverage.covered if coverage else 0,
            "percent": coverage.percent if coverage else None,
            "threshold": coverage.threshold if coverage else None,
            "uncovered": {p: list(lines) for p, lines in coverage.uncovered.items()} if coverage else {},
        },
        "run": {"status": run.status, "pytest_exit": run.pytest_exit, "wall_seconds": round(run.wall_seconds, 3),
                "limit_hit": run.limit_hit} if run else None,
        "findings": [
            {"rule": f.rule, "severity": f.severity, "path": f.path, "line": f.line, "message": f.message,
             **({"details": to_plain(f.details)} if f.details else {})}
            for f in report.findings
        ],
        "notes": list(report.notes),
    }


def _tests(report: Report) -> dict[str, Any]:
    run = report.run
    if run is None:
        return {"run": 0, "passed": 0, "failed": 0, "errors": 0, "skipped": 0, "failed_ids": []}
    return {
        "run": len(run.tests),
        "passed": run.count("passed"),
        "failed": run.count("failed"),
        "errors": run.count("error"),
        "skipped": run.count("skipped"),
        "failed_ids": [t.node_id for t in run.tests if t.outcome in ("failed", "error")],
    }


def error_dict(message: str, exit_code: int) -> dict[str, Any]:
    """The report written when the gate stopped before a verdict (policy error, no sandbox, ...)."""
    return {"format": FORMAT_VERSION, "verdict": "error", "error": message, "exit_code": exit_code}


def render(report: Report) -> str:
    return json.dumps(as_dict(report), indent=2, ensure_ascii=False) + "\n"
