"""The Markdown summary to post on a pull request: the verdict first, then a table of the machine-written
files, then the findings with the code they point at; long parts (test output, long line lists, the
commits) are folded into ``<details>`` blocks, which GitHub and GitLab both render collapsed.
"""

from __future__ import annotations

import re

from verifier.models import Finding, Report
from verifier.report.text import line_spans, printable, waiver_of

SUFFIX = "md"  # a report of this format written into a folder is report.md
FOR_MACHINES = True  # tools read it: alone on stdout

_HEADLINES = {
    "pass": "PASS: the machine-written change is verified",
    "warn": "WARN: verified, with warnings",
    "block": "BLOCK: the machine-written change does not meet the policy",
    "error": "ERROR: the change could not be verified (this is not a pass)",
    "part": "PART: this part of the tests ran; `verifier join` of every part's report gives the verdict",
}
_SHORT_LIST = 12  # line lists longer than this are folded


def render(report: Report) -> str:
    parts = [f"## verifier: {_HEADLINES[report.verdict]}", _summary(report)]
    parts += [_file_table(report), _findings(report), _test_details(report), _commits(report)]
    parts += [f"> note: {_inline(note)}" for note in report.notes]
    # test output, code and file names reach a reader's terminal or editor too: no control character passes
    return printable("\n\n".join(part for part in parts if part) + "\n")


def _summary(report: Report) -> str:
    change, run, cov = report.change, report.run, report.coverage
    base = change.base[:12] if change.base else "the empty tree"
    head = change.head[:12] if change.head != "index" else "the index"
    agents = ", ".join(f"`{agent}`" for agent in report.provenance.agents) or "none"
    rows = [
        f"Change `{_inline(change.spec)}` ({base} → {head}): {len(change.commits)} commit(s), agents {agents}, "
        f"{report.provenance.machine_line_count} machine-written line(s)."
    ]
    if run is not None:
        rows.append(
            f"Tests in the `{run.backend}` sandbox: {len(run.tests)} run, {run.count('passed')} passed, "
            f"{run.count('failed')} failed, {run.count('error')} errors, {run.count('skipped')} skipped "
            f"({run.status}, {run.wall_seconds:.1f}s)."
        )
    if cov is not None and cov.percent is not None:
        rows.append(
            f"Coverage of the executable machine-written lines: {cov.covered}/{cov.executable} = "
            f"{cov.percent:.1f}% (the policy asks for {cov.threshold:g}%)."
        )
    rows += _mutation_summary(report)
    rows.append(f"Policy: {_inline(report.policy_source)}.")
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
    machine = report.provenance.machine_lines
    if not machine:
        return "No machine-written lines in this change: nothing to verify."
    uncovered = report.coverage.uncovered if report.coverage else {}
    measured = report.run.coverage if report.run else {}
    rows = ["| File | Machine-written lines | Executed by the tests | Uncovered (counted) |", "|---|---:|---:|---|"]
    for path, lines in machine.items():
        executed = measured.get(path)
        ran = str(len(set(lines) & executed.executed)) if executed is not None else "–"
        missing = uncovered.get(path, ())
        rows.append(f"| `{_cell(path)}` | {len(lines)} | {ran} | {_line_list(missing) if missing else '0'} |")
    return "\n".join(rows)


def _line_list(lines: tuple[int, ...]) -> str:
    spans = line_spans(lines)
    if len(spans) <= _SHORT_LIST:
        return f"{len(lines)}: {', '.join(spans)}"
    return f"{len(lines)}: {', '.join(spans[:_SHORT_LIST])}, …"


def _findings(report: Report) -> str:
    shown = [f for f in report.findings if f.rule != "coverage.new-lines" or f.line is None]
    if not report.findings:
        return "### Findings\n\nNone."
    rows = [f"### Findings ({len(report.findings)})"]
    rows += [_finding(f, report) for f in shown]
    uncovered = [f for f in report.findings if f.rule == "coverage.new-lines" and f.line is not None]
    if uncovered:
        rows.append(
            _details(
                f"{len(uncovered)} uncovered machine-written line(s), with their code",
                "\n\n".join(_finding(f, report) for f in uncovered),
            )
        )
    return "\n\n".join(rows)


def _finding(finding: Finding, report: Report) -> str:
    where = f" `{_inline(finding.path)}" + (f":{finding.line}" if finding.line else "") + "`" if finding.path else ""
    waiver = waiver_of(finding)
    label = "WAIVED" if waiver else finding.severity.upper()
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
            f"`{_inline(t.node_id)}` ({t.outcome})\n\n{_fence(t.message.strip() or 'no message')}" for t in failing
        )
        parts.append(_details(f"{len(failing)} failing test(s)", body))
    if run.collection_errors:
        parts.append(_details("collection errors", _fence("\n".join(run.collection_errors))))
    if run.tests:
        listing = "\n".join(f"{t.outcome:<8} {t.node_id}" for t in run.tests)
        parts.append(_details(f"all {len(run.tests)} test(s) the gate ran", _fence(listing)))
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
    return _details(f"{len(commits)} commit(s)", "\n".join(rows))


# -- Markdown helpers -----------------------------------------------------------------------------


def _details(summary: str, body: str) -> str:
    return f"<details><summary>{_html(summary)}</summary>\n\n{body}\n\n</details>"


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
    return printable(f"## verifier: {_HEADLINES['error']}\n\n{_inline(message)} (exit code {exit_code})\n")
