"""Coverage of the machine-written lines, counted the way coverage.py counts statements.

A machine-written line counts when it belongs to a statement coverage.py measures: blank lines,
comments and docstrings do not, and a statement spread over several lines counts once, at its first
line. Which lines are statements comes from the run's own coverage report (executed + missing); the
mapping of continuation lines to their statement's first line comes from coverage.py's parser.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping

from verifier.models import CoverageSummary, CoverageTarget, FileCoverage
from verifier.pathglob import matches_any


def summarise_coverage(
    machine_lines: Mapping[str, tuple[int, ...]],
    measured: Mapping[str, FileCoverage],
    sources: Mapping[str, str],
    threshold: float,
    exclude: tuple[str, ...] = (),
    threshold_for: Callable[[str], float] | None = None,
) -> CoverageSummary:
    """Count executable and covered machine-written statements per file.

    ``threshold_for`` gives a file's own threshold (a per-path policy override); a file whose threshold
    differs from ``threshold`` is judged on its own and kept out of the change-wide counts, so that
    neither can hide the other's shortfall.
    """
    executable = covered = 0
    uncovered: dict[str, tuple[int, ...]] = {}
    separate: list[CoverageTarget] = []
    for path, lines in sorted(machine_lines.items()):
        if not path.endswith(".py") or matches_any(path, exclude) or path not in sources:
            continue
        statements, executed = _statements(path, measured.get(path), sources[path])
        firsts = first_lines(sources[path])
        touched = {firsts.get(line, line) for line in lines} & statements
        hit = touched & executed
        own = threshold if threshold_for is None else threshold_for(path)
        if own != threshold:
            separate.append(CoverageTarget(path, own, len(touched), len(hit), tuple(sorted(touched - hit))))
            continue
        executable += len(touched)
        covered += len(hit)
        if touched - hit:
            uncovered[path] = tuple(sorted(touched - hit))
    return CoverageSummary(executable, covered, uncovered, threshold, tuple(separate))


def _statements(path: str, measured: FileCoverage | None, source: str) -> tuple[set[int], set[int]]:
    """The statements of ``path`` and those executed; a file the run never saw is all missing."""
    if measured is not None:
        return set(measured.executed | measured.missing), set(measured.executed)
    return parsed_statements(source), set()


def _parser(source: str):  # type: ignore[no-untyped-def]
    from coverage.config import DEFAULT_EXCLUDE
    from coverage.misc import join_regex
    from coverage.parser import PythonParser

    parser = PythonParser(text=source, exclude=join_regex(DEFAULT_EXCLUDE))
    parser.parse_source()
    return parser


def parsed_statements(source: str) -> set[int]:
    """coverage.py's statements of ``source`` (first lines), with its default exclusions."""
    try:
        return set(_parser(source).statements)
    except Exception:  # a file coverage.py cannot parse is reported by the code.syntax rule
        return set()


def first_lines(source: str) -> dict[int, int]:
    """Map every line of a multi-line statement to the statement's first line."""
    try:
        parser = _parser(source)
    except Exception:
        return {}
    lines = source.count("\n") + 1
    return {line: parser.first_line(line) for line in range(1, lines + 1) if parser.first_line(line) != line}
