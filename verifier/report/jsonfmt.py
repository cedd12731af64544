"""The JSON report: a versioned format that tools read; fields may be added, never change meaning.

FORMAT_VERSION history (one line per version):
  1: verdict, base, head, sandbox, machine_lines, tests, coverage, findings (plus commits, policy, notes);
     added since: waivers_used, coverage.separate (files a per-path override judges on their own);
     selection (which tests ran and why), tests.flaky/flaky_ids/outcomes/differential, a --part run's
     measurements (named "shard" up to version 2); a tests.failing finding's details.pre_existing
     and details.at_base (the test fails at base too).
  2: adds "mutants" (every mutant of the machine-written lines: path, line, status, original, mutated, tests,
     where original/mutated are the full text of the lines it changes), "mutation" (the counts and score) and
     "tests_at_base" (new or changed tests run with a changed file as it was at base: test, path, status).
     added since: "finding_counts" (findings per rule, exact), the ``report.left-out`` finding (what the
     caps of verifier.report.bounds left out of the detail); tests.failed_ids, flaky_ids, outcomes and
     each class of tests.differential list at most bounds.MAX_LISTED_TESTS tests, tests.listed_left_out
     and tests.differential_counts give the exact numbers (a --part report's "part" section keeps every
     test: join needs them). Bytes of a name that are not UTF-8 are written as the text ``\\xNN``.
  3: the section of a ``check --part K/N`` run's measurements, which ``verifier join`` reads, is named "part"
     (was "shard"), and so is selection.part (was selection.shard); such a run's "verdict" is "part" (exit 4).
"""

from __future__ import annotations

import json
from typing import Any

from verifier.models import Report, RunResult, to_plain
from verifier.report.bounds import MAX_LISTED_TESTS, rule_counts, valid_text

SUFFIX = "json"  # a report of this format written into a folder is report.json
FOR_MACHINES = True  # tools read it: alone on stdout

FORMAT_VERSION = 3


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
        "selection": _selection(report),
        "coverage": {
            "executable": coverage.executable if coverage else 0,
            "covered": coverage.covered if coverage else 0,
            "percent": coverage.percent if coverage else None,
            "threshold": coverage.threshold if coverage else None,
            "uncovered": {p: list(lines) for p, lines in coverage.uncovered.items()} if coverage else {},
            "separate": [
                {
                    "path": t.path,
                    "threshold": t.threshold,
                    "executable": t.executable,
                    "covered": t.covered,
                    "percent": t.percent,
                    "uncovered": list(t.uncovered),
                }
                for t in (coverage.separate if coverage else ())
            ],
        },
        "run": {
            "status": run.status,
            "pytest_exit": run.pytest_exit,
            "wall_seconds": round(run.wall_seconds, 3),
            "limit_hit": run.limit_hit,
        }
        if run
        else None,
        "findings": [
            {
                "rule": f.rule,
                "severity": f.severity,
                "path": f.path,
                "line": f.line,
                "message": f.message,
                **({"details": to_plain(f.details)} if f.details else {}),
            }
            for f in report.findings
        ],
        "finding_counts": rule_counts(report),
        "notes": list(report.notes),
        "waivers_used": [
            {
                "rule": w.rule,
                "path": w.path,
                "reason": w.reason,
                "owner": w.owner,
                "expires": w.expires,
                "source": w.source,
            }
            for w in report.waivers_used
        ],
        "mutants": _mutants(report),
        "mutation": _mutation(report),
        "tests_at_base": [
            {"test": o.tests[0] if o.tests else None, "path": o.mutant.path, "status": o.status}
            for o in (report.mutation.at_base if report.mutation else ())
        ],
        **({"part": _part(report)} if report.selection and report.selection.shard and run else {}),
    }


def _mutants(report: Report) -> list[dict[str, Any]]:
    if report.mutation is None:
        return []
    return [
        {
            "path": o.mutant.path,
            "line": o.mutant.line,
            "status": o.status,
            "original": o.mutant.original,
            "mutated": o.mutant.mutated,
            "tests": list(o.tests),
            "operator": o.mutant.operator,
            "end_line": o.mutant.end_line,
            "killed_by": o.killed_by,
            "problem": o.problem,
            "cached": o.cached,
        }
        for o in report.mutation.outcomes
    ]


def _mutation(report: Report) -> dict[str, Any] | None:
    """The counts the rule judged: killed (timeouts and crashes included), survived, accepted by a waiver."""
    from verifier.mutation.counts import mutation_counts

    return mutation_counts(report)


def _tests(report: Report) -> dict[str, Any]:
    run = report.run
    if run is None:
        return {"run": 0, "passed": 0, "failed": 0, "errors": 0, "skipped": 0, "failed_ids": []}
    failed = [t.node_id for t in run.tests if t.outcome in ("failed", "error")]
    flaky = [t.node_id for t in run.tests if t.outcome == "flaky"]
    listed = run.tests[:MAX_LISTED_TESTS]
    return {
        "run": len(run.tests),
        "passed": run.count("passed"),
        "failed": run.count("failed"),
        "errors": run.count("error"),
        "skipped": run.count("skipped"),
        "failed_ids": failed[:MAX_LISTED_TESTS],
        "flaky": run.count("flaky"),
        "flaky_ids": flaky[:MAX_LISTED_TESTS],
        "outcomes": [{"node_id": t.node_id, "outcome": t.outcome, "attempts": t.attempts} for t in listed],
        "differential": _differential(run),
        "differential_counts": _differential_counts(run),
        **({"listed_left_out": len(run.tests) - len(listed)} if len(run.tests) > len(listed) else {}),
    }


def _differential(run: RunResult) -> dict[str, list[str]] | None:
    """Node ids by class (broken, fixed, still-failing, new, unchanged) when a differential run happened,
    at most bounds.MAX_LISTED_TESTS of each (``differential_counts`` has the exact numbers)."""
    if run.baseline is None:
        return None
    from verifier.testrun.differential import CLASSES, classify_run

    classes = classify_run(run.tests, run.baseline)
    return {name: sorted(t for t, found in classes.items() if found == name)[:MAX_LISTED_TESTS] for name in CLASSES}


def _differential_counts(run: RunResult) -> dict[str, int] | None:
    if run.baseline is None:
        return None
    from verifier.testrun.differential import CLASSES, classify_run

    classes = list(classify_run(run.tests, run.baseline).values())
    return {name: classes.count(name) for name in CLASSES}


def _selection(report: Report) -> dict[str, Any] | None:
    selection = report.selection
    if selection is None:
        return None
    return {
        "whole_suite": selection.whole_suite,
        "reason": selection.reason,
        "map": selection.map_status,
        "known_tests": selection.known_tests,
        "left_out": selection.left_out,
        "part": list(selection.shard) if selection.shard else None,
        "selected": {key: list(reasons) for key, reasons in sorted(selection.reasons.items())},
    }


def _part(report: Report) -> dict[str, Any]:
    """What verifier join needs to judge the parts as one run: every test's full outcome and the
    coverage measurements of the machine-written files."""
    run = report.run
    assert run is not None and report.selection is not None
    measured = {path: run.coverage[path] for path in report.provenance.machine_lines if path in run.coverage}
    return {
        "index": report.selection.shard[0] if report.selection.shard else 1,
        "total": report.selection.shard[1] if report.selection.shard else 1,
        "status": run.status,
        "tests": [to_plain(test) for test in run.tests],
        "baseline": dict(run.baseline) if run.baseline is not None else None,
        "coverage": {
            path: {"executed": sorted(c.executed), "missing": sorted(c.missing), "excluded": sorted(c.excluded)}
            for path, c in measured.items()
        },
        "collection_errors": list(run.collection_errors),
        "selection": {
            "whole_suite": report.selection.whole_suite,
            "node_ids": list(report.selection.node_ids),
            "files": list(report.selection.files),
            "reason": report.selection.reason,
        },
    }


def error_dict(message: str, exit_code: int) -> dict[str, Any]:
    """The report written when the gate stopped before a verdict (policy error, no sandbox, ...)."""
    return {"format": FORMAT_VERSION, "verdict": "error", "error": message, "exit_code": exit_code}


def render(report: Report) -> str:
    return json.dumps(valid_text(as_dict(report)), indent=2, ensure_ascii=False) + "\n"


def render_error(message: str, exit_code: int) -> str:
    return json.dumps(valid_text(error_dict(message, exit_code)), indent=2, ensure_ascii=False) + "\n"
