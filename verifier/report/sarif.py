"""SARIF 2.1.0 (the OASIS standard for analysis results): one run, the registry's rules, one result per finding.

Rules carry their summary, explanation and help (with the rule's sources); results carry their level,
message and location (path relative to ``SRCROOT``, the repository's top folder, and the line with its
text when the report has it). What SARIF has no field for goes in property bags: the machine provenance
(commits, agents, machine-written lines) and the test facts (counts, failing ids, coverage) on the run.
The tests validate every log against the OASIS schema (tests/data/sarif-schema-2.1.0.json).
A path's bytes that are not UTF-8 are percent-encoded in its URI (RFC 3986) and written ``\\xNN`` in text.
"""

from __future__ import annotations

import json
from typing import Any
from urllib.parse import quote

from verifier.models import Finding, Report, RunResult
from verifier.report.bounds import MAX_LISTED_TESTS, rule_counts, valid_text

SUFFIX = "sarif"  # a report of this format written into a folder is report.sarif
FOR_MACHINES = True  # tools read it: alone on stdout

SCHEMA_URI = "https://docs.oasis-open.org/sarif/sarif/v2.1.0/errata01/os/schemas/sarif-schema-2.1.0.json"
SARIF_VERSION = "2.1.0"
SRCROOT = "SRCROOT"

# Our severities and settings as SARIF levels (SARIF 2.1.0, section 3.27.10: none, note, warning, error).
LEVELS = {"block": "error", "error": "error", "warn": "warning", "advise": "warning", "info": "note", "ignore": "none"}


def as_dict(report: Report) -> dict[str, Any]:
    from verifier import __version__
    from verifier.verdict.decision import EXIT_CODES

    rules, index = _rules(report.findings)
    run = {
        "tool": {
            "driver": {"name": "verifier", "version": __version__, "semanticVersion": __version__, "rules": rules}
        },
        "invocations": [
            {
                "executionSuccessful": report.verdict != "error",
                "exitCode": EXIT_CODES[report.verdict],
                "properties": {"verdict": report.verdict, "policy": report.policy_source},
            }
        ],
        "originalUriBaseIds": {SRCROOT: {"description": {"text": "the top folder of the repository checked"}}},
        "results": [_result(finding, index, report) for finding in report.findings],
        "properties": {
            "verdict": report.verdict,
            "change": {"spec": report.change.spec, "base": report.change.base, "head": report.change.head},
            "provenance": _provenance(report),
            "tests": _tests(report.run),
            "coverage": _coverage(report),
            "findingCounts": rule_counts(report),
            "notes": list(report.notes),
        },
    }
    return {"$schema": SCHEMA_URI, "version": SARIF_VERSION, "runs": [run]}


def _rules(findings: tuple[Finding, ...]) -> tuple[list[dict[str, Any]], dict[str, int]]:
    """Every registered rule (so a viewer can explain each), plus any rule id a finding names that is not."""
    from verifier.rules.catalog import load_all

    registry = load_all()
    rules = [_rule(rule) for rule in registry.values()]
    for rule_id in dict.fromkeys(f.rule for f in findings):
        if rule_id not in registry:
            rules.append({"id": rule_id, "shortDescription": {"text": rule_id}})
    return rules, {rule["id"]: position for position, rule in enumerate(rules)}


def _rule(rule: Any) -> dict[str, Any]:
    sources = list(rule.sources)
    help_text = rule.explanation + (f"\n\nSources: {'; '.join(sources)}" if sources else "")
    help_markdown = rule.explanation + (
        "\n\n**Sources:**\n" + "".join(f"\n- {source}" for source in sources) if sources else ""
    )
    help_text += f"\n\nExplain it locally: verifier rules {rule.id}"
    return {
        "id": rule.id,
        "shortDescription": {"text": rule.summary},
        "fullDescription": {"text": rule.explanation or rule.summary},
        "help": {"text": help_text, "markdown": help_markdown or rule.summary},
        "defaultConfiguration": {"level": LEVELS[rule.default], "enabled": rule.default != "ignore"},
        "properties": {
            "stage": rule.stage,
            "fixed": rule.fixed,
            "sources": sources,
            "options": {key: value for key, value in rule.options.items()},
        },
    }


def _result(finding: Finding, index: dict[str, int], report: Report) -> dict[str, Any]:
    result: dict[str, Any] = {
        "ruleId": finding.rule,
        "ruleIndex": index[finding.rule],
        "level": LEVELS.get(finding.severity, "error"),
        "message": {"text": finding.message},
        "properties": {"severity": finding.severity},
    }
    if finding.path:
        result["locations"] = [_location(finding, report)]
        owner = report.provenance.line_commits.get(finding.path, {}).get(finding.line or 0)
        machine = finding.line is not None and finding.line in report.provenance.machine_lines.get(finding.path, ())
        result["properties"].update({"machineWritten": machine, "introducedBy": owner})
    if finding.details:
        from verifier.models import to_plain

        result["properties"]["details"] = to_plain(finding.details)
    return result


def _location(finding: Finding, report: Report) -> dict[str, Any]:
    physical: dict[str, Any] = {
        "artifactLocation": {"uri": quote(finding.path or "", errors="surrogateescape"), "uriBaseId": SRCROOT}
    }
    if finding.line:
        region: dict[str, Any] = {"startLine": finding.line}
        text = report.sources.get(finding.path or "", {}).get(finding.line)
        if text is not None:
            region["snippet"] = {"text": text}
        physical["region"] = region
    return {"physicalLocation": physical}


def _provenance(report: Report) -> dict[str, Any]:
    marks = report.provenance.marks
    return {
        "agents": list(report.provenance.agents),
        "commits": [
            {"sha": c.sha, "author": c.author, "agent": marks[c.sha].agent if c.sha in marks else None}
            for c in report.change.commits
        ],
        "machineLines": {path: list(lines) for path, lines in report.provenance.machine_lines.items()},
        "machineLineCount": report.provenance.machine_line_count,
    }


def _tests(run: RunResult | None) -> dict[str, Any]:
    if run is None:
        return {"ran": False}
    return {
        "ran": True,
        "status": run.status,
        "sandbox": run.backend,
        "isolation": run.isolation,
        "run": len(run.tests),
        "passed": run.count("passed"),
        "failed": run.count("failed"),
        "errors": run.count("error"),
        "skipped": run.count("skipped"),
        "failedIds": [t.node_id for t in run.tests if t.outcome in ("failed", "error")][:MAX_LISTED_TESTS],
        "collectionErrors": list(run.collection_errors),
        "wallSeconds": round(run.wall_seconds, 3),
    }


def _coverage(report: Report) -> dict[str, Any]:
    cov = report.coverage
    if cov is None:
        return {"measured": False}
    return {
        "measured": True,
        "executable": cov.executable,
        "covered": cov.covered,
        "percent": cov.percent,
        "threshold": cov.threshold,
        "uncovered": {path: list(lines) for path, lines in cov.uncovered.items()},
    }


def render(report: Report) -> str:
    return json.dumps(valid_text(as_dict(report)), indent=2, ensure_ascii=False) + "\n"


def render_error(message: str, exit_code: int) -> str:
    """A SARIF log saying the run did not complete: the invocation's ``executionSuccessful`` false, its exit
    code and a tool execution notification with the message (the tests validate it against the OASIS schema)."""
    from verifier import __version__

    invocation = {
        "executionSuccessful": False,
        "exitCode": exit_code,
        "toolExecutionNotifications": [{"level": "error", "message": {"text": message}}],
        "properties": {"verdict": "error"},
    }
    run = {
        "tool": {"driver": {"name": "verifier", "version": __version__, "semanticVersion": __version__}},
        "invocations": [invocation],
        "results": [],
        "properties": {"verdict": "error", "error": message},
    }
    log = {"$schema": SCHEMA_URI, "version": SARIF_VERSION, "runs": [run]}
    return json.dumps(valid_text(log), indent=2) + "\n"
