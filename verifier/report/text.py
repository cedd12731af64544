"""The terminal view: the verdict first, then what a reviewer needs to see at a glance.

Colour only when asked for: :func:`wants_colour` says yes for a terminal when ``NO_COLOR`` is unset or empty
(https://no-color.org). ``quiet`` (for hooks) keeps the verdict line, the uncovered lines and the findings.
:class:`StageDisplay` shows progress while the gate works: the sandbox hands its results back only when the
run ends; while the tests run, the supervisor streams per-test progress, which the terminal's line shows
(how many done and left, the test that runs now). Elsewhere (piped, in hooks) each stage is one plain line
and there is no per-test progress.
"""

from __future__ import annotations

import os
import re
import secrets
import sys
import threading
import time
from collections.abc import Callable, Mapping
from typing import TextIO

from verifier.models import Finding, MutantOutcome, Report, RunResult
from verifier.report.bounds import finding_count, surrogate_escape
from verifier.words import counted

Paint = Callable[[str, str], str]  # (style key, text) -> the text, coloured or not

SUFFIX = "txt"  # a report of this format written into a folder is report.txt
FOR_MACHINES = False  # the view for people: on stderr when a machine format takes stdout

_COLOURS = {"pass": "32", "warn": "33", "block": "31", "error": "35", "info": "36", "part": "36"}
_LABELS = {
    "pass": "PASS  the machine-written change is verified",
    "warn": "PASS  verified, with advisory findings",
    "block": "BLOCK the machine-written change does not meet the policy",
    "error": "ERROR the change could not be verified (this is not a pass)",
    "part": "PART  this part of the tests ran; no verdict yet: 'verifier join' of every part's JSON report gives it",
}

# a finding's label: the policy's words (a rule set to advise gives a finding of severity warn)
_SEVERITY_LABELS = {"block": "BLOCK", "warn": "ADVISE", "error": "ERROR", "info": "INFO"}


def wants_colour(stream: TextIO) -> bool:
    """Colour for a terminal, unless ``NO_COLOR`` is set to a non-empty value."""
    return not os.environ.get("NO_COLOR") and hasattr(stream, "isatty") and stream.isatty()


def render(report: Report, colour: bool = False, quiet: bool = False) -> str:
    """The report for a person. Everything in it that came from the change or the sandbox (messages, test
    output, code, file names) is escaped (:func:`printable`): only this function's own colours reach the
    terminal as control sequences."""
    marker = secrets.token_hex(8)  # marks our colours; text from the sandbox cannot guess it
    paint = _painter(marker)
    out = [paint(report.verdict, _LABELS[report.verdict])]
    if quiet:
        out += _coverage(report, paint) if report.verdict != "pass" else []
        out += _findings(report.findings, paint, finding_count(report)) if report.findings else []
    else:
        out.append(_header(report))
        out += _machine_lines(report)
        if not _collected_nothing(report):  # else the run.incomplete finding says it all, in one message
            out += _tests(report)
            out += _coverage(report, paint)
            out += _mutants(report, paint)
        out += _findings(report.findings, paint, finding_count(report))
        out += _waivers(report)
        out += [f"note: {note}" for note in report.notes]
    return _finish("\n".join(out) + "\n", marker, colour)


def _painter(marker: str) -> Paint:
    def paint(key: str, text: str) -> str:
        return f"\x00{marker}{_COLOURS.get(key, '0')}\x00{text}\x00{marker}0\x00"

    return paint


def _finish(text: str, marker: str, colour: bool) -> str:
    """Escape every control character of ``text``, then turn our colour marks into colours (or drop them)."""
    pieces = re.split(f"\x00{marker}(\\d+)\x00", text)
    out = []
    for index, piece in enumerate(pieces):
        if index % 2 == 0:
            out.append(printable(piece))
        elif colour:
            out.append(f"\033[{piece}m")
    return "".join(out)


# C0 controls but newline and tab, DEL, C1 controls, the bidirectional overrides and isolates that can
# make code read differently from how it runs (CVE-2021-42574, "Trojan Source"), and the surrogate escapes
# that hold the bytes of a name that is not UTF-8 (PEP 383), with any other lone surrogate
_CONTROL = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f\u202a-\u202e\u2066-\u2069\ud800-\udfff]")


def printable(text: str) -> str:
    """``text`` with every control character written as an escape (``\\x1b``, ``\\u202e``): test output and
    file names cannot move the cursor, recolour or rewrite what the terminal or a reader shows. A byte of a
    name that is not UTF-8 is written ``\\xNN``, as :func:`verifier.report.bounds.valid_text` writes it."""
    return _CONTROL.sub(_escape, text)


def _escape(match: re.Match[str]) -> str:
    char = match.group(0)
    return surrogate_escape(char) if "\ud800" <= char <= "\udfff" else ascii(char)[1:-1]


def _header(report: Report) -> str:
    change = report.change
    base = change.base[:12] if change.base else "(empty tree)"
    head = change.head[:12] if change.head != "index" else "the index"
    sandbox = f", sandbox {report.run.backend}" if report.run else ""
    agents = ", ".join(report.provenance.agents) or "none"
    return (
        f"change {change.spec}: {base} -> {head}, {counted(len(change.commits), 'commit')}, agents: {agents}{sandbox}"
    )


def _machine_lines(report: Report) -> list[str]:
    machine = report.provenance.machine_lines
    if not machine:
        return ["machine-written lines: none"]
    rows = [f"machine-written lines: {report.provenance.machine_line_count} in {counted(len(machine), 'file')}"]
    rows += [f"  {path}: {len(lines)} ({', '.join(line_spans(lines))})" for path, lines in machine.items()]
    return rows


def _tests(report: Report) -> list[str]:
    run = report.run
    if run is None:
        return []
    counts = f"{len(run.tests)} run, {run.count('passed')} passed, {run.count('failed')} failed, "
    counts += f"{counted(run.count('error'), 'error')}, {run.count('skipped')} skipped"
    if run.count("flaky"):
        counts += f", {run.count('flaky')} flaky"
    return [f"tests: {counts} ({run.status}, {run.wall_seconds:.1f}s)", *_selection(report), *_differential(run)]


def _selection(report: Report) -> list[str]:
    selection = report.selection
    if selection is None:
        return []
    part = f", part {selection.shard[0]}/{selection.shard[1]}" if selection.shard else ""
    if selection.whole_suite:
        return [f"selection: every test ({selection.reason}; map: {selection.map_status}{part})"]
    rows = [
        f"selection: {selection.reason}; "
        f"{selection.left_out} of {counted(selection.known_tests, 'known test')} left out "
        f"(map: {selection.map_status}{part})"
    ]
    groups = _reason_groups(selection.reasons)
    for (reason, is_file), count in groups[:MAX_REASON_GROUPS]:
        rows.append(f"  {counted(count, 'test file' if is_file else 'test')}: {reason}")
    if len(groups) > MAX_REASON_GROUPS:
        rows.append(
            f"  ... {counted(len(groups) - MAX_REASON_GROUPS, 'more reason')} "
            "(the JSON report lists every test and why)"
        )
    return rows


MAX_REASON_GROUPS = 8


def _reason_groups(reasons: Mapping[str, tuple[str, ...]]) -> list[tuple[tuple[str, bool], int]]:
    """How many tests (node ids) and test files each reason chose, the largest groups first."""
    counts: dict[tuple[str, bool], int] = {}
    for key, why in reasons.items():
        for reason in why:
            group = (reason, "::" not in key)
            counts[group] = counts.get(group, 0) + 1
    return sorted(counts.items(), key=lambda item: (-item[1], item[0]))


def _differential(run: RunResult) -> list[str]:
    if run.baseline is None:
        return []
    from collections import Counter

    from verifier.testrun.differential import CLASSES, classify_run

    counts = Counter(classify_run(run.tests, run.baseline).values())
    return ["against base: " + ", ".join(f"{counts[name]} {name}" for name in CLASSES)]


def _coverage(report: Report, paint: Paint) -> list[str]:
    cov = report.coverage
    if cov is None:
        return []
    if cov.percent is None and not cov.separate:
        return ["coverage of machine-written lines: no executable machine-written lines"]
    rows = [
        f"coverage of machine-written lines: {cov.covered}/{cov.executable} = {cov.percent:.1f}% "
        f"(threshold {cov.threshold:g}%)"
        if cov.percent is not None
        else "coverage of machine-written lines: none outside the files with their own threshold"
    ]
    rows += [
        f"  {t.path}: {t.covered}/{t.executable} = {t.percent:.1f}% (its own threshold {t.threshold:g}%)"
        for t in cov.separate
        if t.percent is not None
    ]
    uncovered = {**cov.uncovered, **{t.path: t.uncovered for t in cov.separate if t.uncovered}}
    for path, lines in uncovered.items():
        source = report.sources.get(path, {})
        rows.append(f"  uncovered in {path}:")
        rows += [f"    {paint('block', f'{line:>5}')} | {source.get(line, '').rstrip()}" for line in lines[:40]]
        if len(lines) > 40:
            rows.append(f"    ... and {len(lines) - 40} more")
    return rows


def _mutants(report: Report, paint: Paint) -> list[str]:
    """The score, then the surviving mutants under their file: line, before -> after, the tests that ran it."""
    from verifier.mutation.counts import accepted_lines, mutation_counts

    counts = mutation_counts(report)
    if counts is None or report.mutation is None:
        return []
    score = "no mutant judged" if counts["score"] is None else f"{counts['score']:.1f}% killed"
    rows = [
        f"mutants of machine-written lines: {counts['killed']}/{counts['killed'] + counts['survived']} killed = {score}"
        f" ({counts['survived']} survived, {counts['accepted']} accepted by waivers, {counts['not_run']} not run"
        + (f", {counts['cached']} from the cache" if counts["cached"] else "")
        + ")"
    ]
    accepted = accepted_lines(report)
    by_path: dict[str, list[MutantOutcome]] = {}
    for outcome in report.mutation.outcomes:
        if outcome.status == "survived":
            by_path.setdefault(outcome.mutant.path, []).append(outcome)
    for path, survivors in by_path.items():
        rows.append(f"  surviving in {path}:")
        for outcome in survivors[:40]:
            mutant = outcome.mutant
            label = "accepted" if (path, mutant.line) in accepted else "block"
            tests = ", ".join(outcome.tests[:3]) + (f" +{len(outcome.tests) - 3}" if len(outcome.tests) > 3 else "")
            rows.append(
                f"    {paint(label if label == 'block' else 'info', f'{mutant.line:>5}')} | "
                f"{mutant.original.strip()}  ->  {mutant.mutated.strip()}  (ran by {tests})"
            )
        if len(survivors) > 40:
            rows.append(f"    ... and {len(survivors) - 40} more")
    return rows


def _findings(findings: tuple[Finding, ...], paint: Paint, total: int) -> list[str]:
    """Every finding counted (``total``, the same number as the other formats, whatever the report's
    bounds left out of the detail); the uncovered lines are listed once, under coverage, and only counted here."""
    if not findings:
        return ["findings: none"]
    shown = [f for f in findings if not (f.rule == "coverage.new-lines" and f.line is not None)]
    rows = [f"findings: {total}"]
    for finding in shown:
        where = f" {finding.path}" + (f":{finding.line}" if finding.line else "") if finding.path else ""
        if finding.path and finding.message.startswith(f"{finding.path}::"):
            where = ""  # the message starts with the test's node id, which names the file already
        label = paint(finding.severity, "WAIVED" if waiver_of(finding) else _SEVERITY_LABELS[finding.severity])
        rows.append(f"  {label} [{finding.rule}]{where} {finding.message}{_waived_note(finding)}")
        tail = finding.details.get("output_tail") if finding.details else None
        if tail:
            rows += [f"      {line}" for line in str(tail).strip().splitlines()[-15:]]
    hidden = len(findings) - len(shown)
    if hidden:
        rows.append(f"  {hidden} more [coverage.new-lines]: the uncovered machine-written lines listed above")
    return rows


def _collected_nothing(report: Report) -> bool:
    return report.run is not None and report.run.status == "no-tests"


def waiver_of(finding: Finding) -> dict[str, str] | None:
    """The waiver record a waived finding carries (``details["waived_by"]``), else None."""
    waiver = finding.details.get("waived_by") if finding.details else None
    return waiver if isinstance(waiver, dict) else None


def _waived_note(finding: Finding) -> str:
    waiver = waiver_of(finding)
    if waiver is None:
        return ""
    was = finding.details.get("waived_severity", "block")
    return (
        f" (waived: would {was}; owner {waiver.get('owner')}, expires {waiver.get('expires')}, {waiver.get('source')})"
    )


def _waivers(report: Report) -> list[str]:
    if not report.waivers_used:
        return []
    rows = [f"waivers used: {len(report.waivers_used)}"]
    rows += [
        f"  {w.rule} on {w.path} (owner {w.owner}, until {w.expires}, {w.source}): {w.reason}"
        for w in report.waivers_used
    ]
    return rows


def line_spans(lines: tuple[int, ...]) -> list[str]:
    """Sorted line numbers as compact spans: (3, 4, 5, 10) -> ["3-5", "10"]."""
    spans: list[list[int]] = []
    for line in lines:
        if spans and line == spans[-1][1] + 1:
            spans[-1][1] = line
        else:
            spans.append([line, line])
    return [f"{a}-{b}" if a != b else f"{a}" for a, b in spans]


_SPINNER = "|/-\\"
MAX_TEST_NAME = 200  # characters of the running test's node id (the terminal's width cuts it further)


class StageDisplay:
    """Progress while the gate works: a callable taking stage names, used as a context manager.

    On a terminal one line is redrawn (spinner, stage, seconds in it); otherwise each stage is printed once.
    """

    def __init__(self, stream: TextIO | None = None, interval: float = 0.1) -> None:
        self.stream = stream or sys.stderr
        self.live = hasattr(self.stream, "isatty") and self.stream.isatty()
        self.interval = interval
        self._stage = ""
        self._detail: tuple[str, str] | None = None  # the running tests' counts and current test, on a terminal
        self._since = time.monotonic()
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def __call__(self, stage: str) -> None:
        with self._lock:
            if self.live and self._stage:
                self._draw(final=True)
            self._stage, self._since, self._detail = stage, time.monotonic(), None
            if not self.live:
                print(f"verifier: {stage}", file=self.stream, flush=True)

    def tests(self, done: int, total: int, current: str) -> None:
        """Per-test progress of the stage that runs the tests (on a terminal; elsewhere nothing)."""
        if not self.live:
            return
        left = max(total - done, 0)
        with self._lock:
            self._detail = f"tests {done}/{total} done, {left} left", printable(current)[:MAX_TEST_NAME]

    def __enter__(self) -> StageDisplay:
        if self.live:
            self._thread = threading.Thread(target=self._spin, name="verifier-progress", daemon=True)
            self._thread.start()
        return self

    def __exit__(self, *_exc: object) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join()
            with self._lock:
                if self._stage:
                    self._draw(final=True)

    def _spin(self) -> None:
        turn = 0
        while not self._stop.wait(self.interval):
            with self._lock:
                if self._stage:
                    self._draw(final=False, turn=turn)
            turn += 1

    def _width(self) -> int:
        try:
            return os.get_terminal_size(self.stream.fileno()).columns or 80
        except (OSError, ValueError, AttributeError):
            return 80

    def _draw(self, final: bool, turn: int = 0) -> None:
        elapsed = time.monotonic() - self._since
        mark = "done" if final else _SPINNER[turn % len(_SPINNER)]
        end = "\n" if final else ""
        if self._detail and not final:
            counts, current = self._detail
            line = f"verifier: {counts} ({elapsed:.1f}s) {mark}" + (f" running {current}" if current else "")
        else:
            line = f"verifier: {self._stage} ({elapsed:.1f}s) {mark}"
        if not final:  # one terminal row, or the redraw would leave the wrapped part behind
            line = line[: self._width() - 1]
        self.stream.write(f"\r\033[2K{line}{end}")
        self.stream.flush()


def render_error(message: str, exit_code: int) -> str:
    return printable(f"{_LABELS['error']}\n  {message} (exit code {exit_code})\n")
