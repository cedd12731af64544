"""Coverage of the machine-written lines, counted the way coverage.py counts statements and branches.

Which lines are statements, which are excluded and which branches a line has is computed here, on the
host, with coverage.py's own parser (``coverage.parser.PythonParser``) run on the committed source,
never taken from the sandbox. From the sandbox comes only what the tests executed: lines, arcs and
per-test contexts in a plain, validated JSON (:func:`read_export`). A machine-written line counts when
it belongs to a statement: blank lines, comments and docstrings do not, and a statement spread over
several lines counts once, at its first line. Machine lines that coverage.py's exclusions hide are
reported, and a branch line the tests executed without taking each of its ways is partial (when the
way not taken leads to an executed line or out of the function; one to an unexecuted line is already an
uncovered line).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

from verifier.models import CoverageSummary, CoverageTarget, FileCoverage

EXPORT_LIMITS = {"files": 200_000, "contexts": 2_000_000, "line": 10_000_000, "context_chars": 4096}


@dataclass(frozen=True)
class SourceAnalysis:
    """coverage.py's view of one file's source: statements (first lines), excluded lines, possible arcs."""

    statements: frozenset[int]
    excluded: frozenset[int]
    arcs: frozenset[tuple[int, int]]
    branch_lines: frozenset[int]
    first_lines: Mapping[int, int]
    line_count: int


def _parser(source: str) -> Any:
    from coverage.config import DEFAULT_EXCLUDE
    from coverage.misc import join_regex
    from coverage.parser import PythonParser

    parser = PythonParser(text=source, exclude=join_regex(DEFAULT_EXCLUDE))
    parser.parse_source()
    return parser


def analyse_source(source: str) -> SourceAnalysis | None:
    """coverage.py's analysis of ``source`` with its default exclusions; None when it cannot parse it."""
    try:
        parser = _parser(source)
        arcs = frozenset(parser.arcs())
        exits = parser.exit_counts()
    except Exception:  # a file coverage.py cannot parse is reported by the code.syntax rule
        return None
    lines = source.count("\n") + 1
    firsts = {line: parser.first_line(line) for line in range(1, lines + 1) if parser.first_line(line) != line}
    return SourceAnalysis(
        statements=frozenset(parser.statements),
        excluded=frozenset(parser.excluded),
        arcs=arcs,
        branch_lines=frozenset(line for line, count in exits.items() if count > 1),
        first_lines=firsts,
        line_count=lines,
    )


def parsed_statements(source: str) -> set[int]:
    """coverage.py's statements of ``source`` (first lines), with its default exclusions."""
    analysis = analyse_source(source)
    return set(analysis.statements) if analysis else set()


def first_lines(source: str) -> dict[int, int]:
    """Map every line of a multi-line statement to the statement's first line."""
    analysis = analyse_source(source)
    return dict(analysis.first_lines) if analysis else {}


# -- what the sandbox exported -------------------------------------------------------------------------


@dataclass(frozen=True)
class Executed:
    """What the tests executed in one file, as the sandbox's export says (validated, not yet trusted)."""

    lines: frozenset[int]
    arcs: frozenset[tuple[int, int]] | None
    contexts: Mapping[int, tuple[str, ...]]


class ExportError(ValueError):
    """The sandbox's coverage export is not of the expected shape."""


def _ints(value: Any, low: int, what: str) -> list[int]:
    if not isinstance(value, list) or not all(type(v) is int and low <= v <= EXPORT_LIMITS["line"] for v in value):
        raise ExportError(f"{what}: not a list of line numbers")
    return value


def _safe_path(path: Any) -> str:
    if not isinstance(path, str) or not path or len(path) > 4096 or "\0" in path:
        raise ExportError("a measured file has no usable name")
    parts = path.split("/")
    if path.startswith("/") or ".." in parts or "" in parts:
        raise ExportError(f"a measured file outside the workspace: {path[:200]!r}")
    return path


def read_export(value: Any) -> dict[str, Executed]:
    """Validate the sandbox's coverage export (types, sizes, paths) into executed lines per file."""
    if not isinstance(value, dict) or not isinstance(value.get("files"), dict):
        raise ExportError("no file table")
    labels = value.get("contexts")
    if not isinstance(labels, list) or len(labels) > EXPORT_LIMITS["contexts"]:
        raise ExportError("no context table")
    if not all(isinstance(c, str) and len(c) <= EXPORT_LIMITS["context_chars"] for c in labels):
        raise ExportError("a context label is not a short string")
    if len(value["files"]) > EXPORT_LIMITS["files"]:
        raise ExportError("too many measured files")
    return {_safe_path(path): _executed(path, entry, labels) for path, entry in value["files"].items()}


def _executed(path: str, entry: Any, labels: list[str]) -> Executed:
    if not isinstance(entry, dict):
        raise ExportError(f"{path}: not an object")
    lines = frozenset(_ints(entry.get("lines"), 1, path))
    arcs = None
    if entry.get("arcs") is not None:
        raw = entry["arcs"]
        if not isinstance(raw, list) or not all(isinstance(a, list) and len(a) == 2 for a in raw):
            raise ExportError(f"{path}: arcs are not pairs")
        arcs = frozenset((a, b) for a, b in (_ints(pair, -EXPORT_LIMITS["line"], path) for pair in raw))
    contexts_value = entry.get("contexts")
    if not isinstance(contexts_value, dict):
        raise ExportError(f"{path}: no contexts")
    contexts: dict[int, tuple[str, ...]] = {}
    for line, indexes in contexts_value.items():
        if not (isinstance(line, str) and line.isdigit()):
            raise ExportError(f"{path}: a context line is not a number")
        picked = _ints(indexes, 0, path)
        if any(i >= len(labels) for i in picked):
            raise ExportError(f"{path}: a context index outside the table")
        contexts[int(line)] = tuple(labels[i] for i in picked)
    return Executed(lines, arcs, contexts)


def judge_file(path: str, analysis: SourceAnalysis, executed: Executed) -> FileCoverage:
    """One judged file's coverage: host statements against the executed lines, branches against arcs."""
    if any(line > analysis.line_count for line in executed.lines):
        raise ExportError(f"{path}: executed lines beyond the end of the committed file")

    def first(line: int) -> int:
        return analysis.first_lines.get(line, line)

    ran = {first(line) for line in executed.lines} & analysis.statements
    taken = {(first(a) if a > 0 else a, first(b) if b > 0 else b) for a, b in executed.arcs or ()}
    missing_branches: dict[int, tuple[int, ...]] = {}
    if executed.arcs is not None:
        for line in sorted(analysis.branch_lines & ran):
            missed = sorted(
                b for a, b in analysis.arcs if a == line and (a, b) not in taken and b not in analysis.excluded
            )
            if missed:
                missing_branches[line] = tuple(missed)
    return FileCoverage(
        path=path,
        executed=frozenset(ran),
        missing=frozenset(analysis.statements - ran),
        excluded=analysis.excluded,
        contexts=dict(executed.contexts),
        missing_branches=missing_branches,
    )


# -- the summary the coverage rules read ---------------------------------------------------------------


def summarise_coverage(
    machine_lines: Mapping[str, tuple[int, ...]],
    measured: Mapping[str, FileCoverage],
    sources: Mapping[str, str],
    threshold: float,
    is_test_code: Callable[[str], bool] | None = None,
    threshold_for: Callable[[str], float] | None = None,
) -> CoverageSummary:
    """Count executable and covered machine-written statements per file.

    ``threshold_for`` gives a file's own threshold (a per-path policy override); a file whose threshold
    differs from ``threshold`` is judged on its own and kept out of the change-wide counts, so that
    neither can hide the other's shortfall. ``is_test_code`` (:mod:`verifier.testrun.testfiles`) tells the
    test files, which are not judged.
    """
    executable = covered = 0
    uncovered: dict[str, tuple[int, ...]] = {}
    excluded: dict[str, tuple[int, ...]] = {}
    partial: dict[str, dict[int, tuple[int, ...]]] = {}
    separate: list[CoverageTarget] = []
    for path, lines in sorted(machine_lines.items()):
        if not path.endswith(".py") or (is_test_code is not None and is_test_code(path)) or path not in sources:
            continue
        file = measured.get(path)
        statements, executed = _statements(file, sources[path])
        firsts = first_lines(sources[path])
        touched = {firsts.get(line, line) for line in lines} & statements
        hit = touched & executed
        if file is not None:
            hidden = sorted(set(lines) & file.excluded)
            if hidden:
                excluded[path] = tuple(hidden)
            branches = _partial(file, touched)
            if branches:
                partial[path] = branches
        own = threshold if threshold_for is None else threshold_for(path)
        if own != threshold:
            separate.append(CoverageTarget(path, own, len(touched), len(hit), tuple(sorted(touched - hit))))
            continue
        executable += len(touched)
        covered += len(hit)
        if touched - hit:
            uncovered[path] = tuple(sorted(touched - hit))
    return CoverageSummary(executable, covered, uncovered, threshold, tuple(separate), excluded, partial)


def _partial(file: FileCoverage, lines: set[int]) -> dict[int, tuple[int, ...]]:
    """The ways not taken from ``lines`` that no other finding shows: to an exit, or to a line the tests
    did execute (a way to a never-executed line is already an uncovered line)."""
    found = {}
    for line in sorted(lines & set(file.missing_branches)):
        hidden = tuple(t for t in file.missing_branches[line] if t < 0 or t in file.executed)
        if hidden:
            found[line] = hidden
    return found


def _statements(measured: FileCoverage | None, source: str) -> tuple[set[int], set[int]]:
    """The statements of a file and those executed; a file the run never saw is all missing."""
    if measured is not None:
        return set(measured.executed | measured.missing), set(measured.executed)
    return parsed_statements(source), set()
