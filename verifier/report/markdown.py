"""The Markdown summary to post on a pull request, in a layout of our own: a heading with the verdict word
and the finding counts, one sentence on the change, a table of the findings per file, then each file's
findings (with the code they point at) folded into a ``<details>`` block, open when it holds a blocking
one; test output and the commits are folded too (GitHub and GitLab render ``<details>`` collapsed).
"""

from __future__ import annotations

import re
from collections.abc import Sequence

from verifier.models import Finding, Report
from verifier.report.bounds import MAX_LISTED_TESTS, MAX_TEST_REPORTS, finding_count
from verifier.report.text import line_spans, printable, waiver_of
from verifier.words import counted

SUFFIX = "md"  # a report of this format written into a folder is report.md
FOR_MACHINES = True  # tools read it: alone on stdout

_HEADLINES = {
    "pass": "the machine-written change is verified",
    "warn": "verified, with advice to read",
    "block": "the machine-written change does not meet the policy",
    "error": "the change could not be verified (this is not a pass)",
    "part": "this part of the tests ran; `verifier join` of every part's report gives the verdict",
}
_SHORT_LIST = 12  # line lists longer than this are folded
_WHOLE_CHANGE = "(whole change)"


def render(report: Report) -> str:
    parts = [_heading(report), _summary(report), _file_table(report), _findings(report)]
    parts += [_test_details(report), _commits(report)]
    parts += [f"> note: {_inline(note)}" for note in report.notes]
    # test output, code and file names reach a reader's terminal or editor too: no control character passes
    return printable("\n\n".join(part for part in parts if part) + "\n")


def _heading(report: Report) -> str:
    total = finding_count(report)
    named = _tally(report.findings)
    tally = counted(total, "finding") + (f": {named}" if named else "") if total else "no findings"
    return f"## {report.verdict.upper()} · verifier · {tally}"


def _tally(findings: Sequence[Finding]) -> str:
    """``2 blocking, 1 waived``: the non-zero counts."""
    counts = zip(("blocking", "advisory", "waived"), _counts(findings), strict=True)
    return ", ".join(f"{n} {word}" for word, n in counts if n)


def _counts(findings: Sequence[Finding]) -> tuple[int, int, int]:
    """(blocking, advisory, waived) among ``findings``; errors count as blocking, plain info as neither."""
    waived = sum(1 for f in findings if waiver_of(f))
    blocking = sum(1 for f in findings if f.severity in ("block", "error"))
    advisory = sum(1 for f in findings if f.severity == "warn")
    return blocking, advisory, waived


def _summary(report: Report) -> str:
    change, run, cov = report.change, report.run, report.coverage
    base = change.base[:12] if change.base else "the empty tree"
    head = change.head[:12] if change.head != "index" else "the index"
    agents = ", ".join(f"`{agent}`" for agent in report.provenance.agents) or "none"
    lines = report.provenance.machine_line_count
    rows = [
        f"**{_HEADLINES[report.verdict].capitalize()}.** Change `{_inline(change.spec)}` ({base} → {head}), "
        f"{counted(len(change.commits), 'commit')} by {agents}, "
        f"{counted(lines, 'machine-written line')}; policy {_inline(report.policy_source)}."
    ]
    if run is not None:
        rows.append(
            f"Tests (`{run.backend}` sandbox, {run.status}, {run.wall_seconds:.1f}s): {run.count('passed')} passed, "
            f"{run.count('failed')} failed, {counted(run.count('error'), 'error')}, {run.count('skipped')} skipped "
            f"of {len(run.tests)}."
        )
    if cov is not None and cov.percent is not None:
        rows.append(
            f"The tests ran {cov.covered} of the {cov.executable} executable machine-written lines "
            f"({cov.percent:.1f}%; the policy wants {cov.threshold:g}% or more)."
        )
    rows += _mutation_summary(report)
    return "\n".join(rows)


def _mutation_summary(report: Report) -> list[str]:
    from verifier.mutation.counts import mutation_counts

    counts = mutation_counts(report)
    if counts is None or counts["score"] is None:
        return []
    judged = counts["killed"] + counts["survived"]
    return [
        f"Mutants of the machine-written lines: {counts['killed']}/{judged} killed = {counts['score']:.1f}% "
        f"({counts['survived']} survived, {counts['accepted']} accepted by waivers, {counts['not_run']} not run)."
    ]


def _file_table(report: Report) -> str:
    """One row per machine-written file (and per other file with a finding): its findings and its lines."""
    machine = report.provenance.machine_lines
    if not machine and not report.findings:
        return "No machine-written lines in this change: nothing to verify."
    uncovered = report.coverage.uncovered if report.coverage else {}
    by_file = _by_file(report.findings)
    rows = [
        "| File | Blocking | Advisory | Waived | Machine-written lines | Not run by any test |",
        "|---|---:|---:|---:|---:|---|",
    ]
    for path in _file_order(report, by_file):
        blocking, advisory, waived = _counts(by_file.get(path, []))
        missing = uncovered.get(path, ()) if path != _WHOLE_CHANGE else ()
        lines = str(len(machine[path])) if path in machine else "–"
        name = path if path == _WHOLE_CHANGE else f"`{_cell(path)}`"
        rows.append(
            f"| {name} | {blocking} | {advisory} | {waived} | {lines} | {_line_list(missing) if missing else '–'} |"
        )
    return "\n".join(rows)


def _file_order(report: Report, by_file: dict[str, list[Finding]]) -> list[str]:
    """The whole change's findings first, then the files with the most blocking findings, then by name."""
    paths = {*report.provenance.machine_lines, *by_file}
    return sorted(paths, key=lambda path: (path != _WHOLE_CHANGE, -_counts(by_file.get(path, []))[0], path))


def _by_file(findings: Sequence[Finding]) -> dict[str, list[Finding]]:
    grouped: dict[str, list[Finding]] = {}
    for finding in findings:
        grouped.setdefault(finding.path or _WHOLE_CHANGE, []).append(finding)
    return grouped


def _line_list(lines: tuple[int, ...]) -> str:
    spans = line_spans(lines)
    if len(spans) <= _SHORT_LIST:
        return f"{len(lines)}: {', '.join(spans)}"
    return f"{len(lines)}: {', '.join(spans[:_SHORT_LIST])}, …"


def _findings(report: Report) -> str:
    if not report.findings:
        return ""
    rows = [f"### Findings ({finding_count(report)})"]
    by_file = _by_file(report.findings)
    for path in _file_order(report, by_file):
        findings = by_file.get(path)
        if not findings:
            continue
        summary = f"{path}: {_tally(findings) or f'{len(findings)} to read'}"
        body = "\n\n".join(_finding(f, report) for f in findings)
        rows.append(_details(summary, body, open_=_counts(findings)[0] > 0))
    return "\n\n".join(rows)


def _finding(finding: Finding, report: Report) -> str:
    where = f" line {finding.line}" if finding.path and finding.line else ""
    waiver = waiver_of(finding)
    label = "WAIVED" if waiver else {"warn": "ADVISE"}.get(finding.severity, finding.severity.upper())
    text = f"- **{label}** `{finding.rule}`{where}: {_inline(finding.message)}"
    if waiver:
        was = finding.details.get("waived_severity", "block")
        text += (
            f" (waived: would {was}; owner {_inline(waiver.get('owner', ''))}, "
            f"expires {waiver.get('expires')}, `{_inline(waiver.get('source', ''))}`)"
        )
    excerpt = _excerpt(finding, report)
    if excerpt:
        text += "\n\n" + _indent(excerpt)
    tail = finding.details.get("output_tail") if finding.details else None
    if tail:
        text += "\n\n" + _indent(_details("output", _fence(str(tail).strip())))
    return text


def _excerpt(finding: Finding, report: Report) -> str:
    """The machine-written lines around the finding (the report keeps the text of those lines only)."""
    if not finding.path or not finding.line:
        return ""
    source = report.sources.get(finding.path, {})
    near = [n for n in range(finding.line - 2, finding.line + 3) if n in source]
    if finding.line not in source:
        return ""
    body = "\n".join(f"{'>' if n == finding.line else ' '} {n:>5} | {source[n].rstrip()}" for n in near)
    return _fence(body)


def _test_details(report: Report) -> str:
    run = report.run
    if run is None:
        return ""
    failing = [t for t in run.tests if t.outcome in ("failed", "error")]
    parts = []
    if failing:
        body = "\n\n".join(
            f"`{_inline(t.node_id)}` ({t.outcome})\n\n{_fence(t.message.strip() or 'no message')}"
            for t in failing[:MAX_TEST_REPORTS]
        )
        if len(failing) > MAX_TEST_REPORTS:
            left = len(failing) - MAX_TEST_REPORTS
            body += f"\n\n… and {counted(left, 'more failing test')}, their reports left out"
        parts.append(_details(counted(len(failing), "failing test"), body))
    if run.collection_errors:
        parts.append(_details("collection errors", _fence("\n".join(run.collection_errors))))
    if run.tests:
        listing = "\n".join(f"{t.outcome:<8} {t.node_id}" for t in run.tests[:MAX_LISTED_TESTS])
        if len(run.tests) > MAX_LISTED_TESTS:
            listing += f"\n… and {len(run.tests) - MAX_LISTED_TESTS} more"
        every = "all " if len(run.tests) > 1 else ""
        parts.append(_details(f"{every}{counted(len(run.tests), 'test')} the gate ran", _fence(listing)))
    return "\n\n".join(parts)


def _commits(report: Report) -> str:
    commits = report.change.commits
    if not commits:
        return ""
    marks = report.provenance.marks
    rows = ["| Commit | Author | Agent | Subject |", "|---|---|---|---|"]
    for commit in commits:
        agent = f"`{_cell(marks[commit.sha].agent)}`" if commit.sha in marks else "–"
        subject = commit.message.strip().split("\n", 1)[0] if commit.message.strip() else ""
        rows.append(f"| `{commit.sha[:12]}` | {_cell(commit.author)} | {agent} | {_cell(subject)} |")
    return _details(f"{counted(len(commits), 'commit')}", "\n".join(rows))


# -- Markdown helpers -----------------------------------------------------------------------------


def _details(summary: str, body: str, open_: bool = False) -> str:
    opening = "<details open>" if open_ else "<details>"
    return f"{opening}<summary>{_html(summary)}</summary>\n\n{body}\n\n</details>"


def _fence(text: str) -> str:
    """A code block whose fence is longer than any run of backticks inside it."""
    longest = max((len(run) for run in re.findall(r"`+", text)), default=0)
    fence = "`" * max(3, longest + 1)
    return f"{fence}\n{text}\n{fence}"


def _indent(text: str) -> str:
    return "\n".join(f"  {line}" if line else "" for line in text.split("\n"))


def _inline(text: str) -> str:
    return text.replace("\n", " ").replace("<", "&lt;").replace(">", "&gt;")


def _cell(text: str) -> str:
    return _inline(text).replace("|", "\\|").replace("`", "'")


def _html(text: str) -> str:
    return text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")


def render_error(message: str, exit_code: int) -> str:
    return printable(f"## ERROR · verifier · {_HEADLINES['error']}\n\n{_inline(message)} (exit code {exit_code})\n")
