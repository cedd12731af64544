"""Coverage judged on the host: coverage.py's analysis of the committed source, the export's validation."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest

from verifier.models import FileCoverage
from verifier.testrun.measure import Executed, ExportError, analyse_source, judge_file, read_export, summarise_coverage

SOURCE = (
    '"""Prices."""\n\n\ndef price(x):\n    if x > 10:\n        return (\n            x\n            - 1\n        )\n'
    "    return x  # pragma: no cover\n"
)


def test_analysis_agrees_with_coverage_pys_json_report(tmp_path: Path) -> None:
    """Outside check: coverage.py's own ``coverage json`` report of a real run gives the same statements,
    excluded lines and missing branches as the host's analysis joined with the executed arcs."""
    (tmp_path / "prices.py").write_text(SOURCE)
    (tmp_path / "run.py").write_text("import prices\nprices.price(20)\n")
    subprocess.run([sys.executable, "-m", "coverage", "run", "--branch", "run.py"], cwd=tmp_path, check=True)
    subprocess.run([sys.executable, "-m", "coverage", "json", "-q", "--include=prices.py"], cwd=tmp_path, check=True)
    report = json.loads((tmp_path / "coverage.json").read_text())["files"]["prices.py"]
    import coverage

    data = coverage.CoverageData(basename=str(tmp_path / ".coverage"))
    data.read()
    name = next(n for n in data.measured_files() if n.endswith("prices.py"))
    executed = Executed(frozenset(data.lines(name) or ()), frozenset(data.arcs(name) or ()), {})
    analysis = analyse_source(SOURCE)
    assert analysis is not None
    judged = judge_file("prices.py", analysis, executed)
    assert sorted(judged.executed) == report["executed_lines"]
    assert sorted(judged.missing) == report["missing_lines"]
    assert sorted(analysis.excluded) == report["excluded_lines"]
    expected: dict[int, list[int]] = {}
    for source, target in report["missing_branches"]:  # pairs [from, to] in coverage.py's JSON format
        expected.setdefault(source, []).append(target)
    assert {line: list(targets) for line, targets in judged.missing_branches.items()} == expected


def good_export() -> dict[str, Any]:
    return {
        "contexts": ["", "t::a"],
        "files": {"pk/m.py": {"lines": [1, 2], "arcs": [[-1, 1], [1, 2]], "contexts": {"2": [1]}}},
    }


def test_a_valid_export() -> None:
    executed = read_export(good_export())["pk/m.py"]
    assert executed.lines == {1, 2} and executed.arcs == {(-1, 1), (1, 2)} and executed.contexts == {2: ("t::a",)}


@pytest.mark.parametrize(
    ("path", "value", "expected"),
    [
        (("files",), [], "no file table"),
        (("contexts",), [1], "not a short string"),
        (("files", "pk/m.py", "lines"), ["1"], "not a list of line numbers"),
        (("files", "pk/m.py", "lines"), [True], "not a list of line numbers"),
        (("files", "pk/m.py", "lines"), [0], "not a list of line numbers"),
        (("files", "pk/m.py", "arcs"), [[1, 2, 3]], "not pairs"),
        (("files", "pk/m.py", "contexts"), {"2": [7]}, "outside the table"),
        (("files", "pk/m.py", "contexts"), {"x": [0]}, "not a number"),
    ],
)
def test_malformed_exports_are_refused(path: tuple[str, ...], value: Any, expected: str) -> None:
    export = good_export()
    target = export
    for key in path[:-1]:
        target = target[key]
    target[path[-1]] = value
    with pytest.raises(ExportError, match=expected):
        read_export(export)


@pytest.mark.parametrize("name", ["/etc/passwd", "../outside.py", "pk//m.py", "a\0b.py"])
def test_paths_outside_the_workspace_are_refused(name: str) -> None:
    export = good_export()
    export["files"] = {name: export["files"]["pk/m.py"]}
    with pytest.raises(ExportError):
        read_export(export)


def test_lines_beyond_the_committed_file_are_refused() -> None:
    analysis = analyse_source("x = 1\n")
    assert analysis is not None
    with pytest.raises(ExportError, match="beyond the end"):
        judge_file("pk/m.py", analysis, Executed(frozenset({1, 40}), None, {}))


def test_summary_reports_excluded_and_partial_machine_lines() -> None:
    analysis = analyse_source(SOURCE)
    assert analysis is not None
    measured = judge_file("prices.py", analysis, Executed(frozenset({4, 5, 6}), frozenset({(-4, 5), (5, 6)}), {}))
    summary = summarise_coverage({"prices.py": (5, 6, 10)}, {"prices.py": measured}, {"prices.py": SOURCE}, 90.0)
    assert summary.excluded == {"prices.py": (10,)}
    assert summary.partial_branches == {}  # the other way goes to an excluded line: nothing to take
    assert (summary.executable, summary.covered) == (2, 2)
    plain = "def f(x):\n    rate = 1\n    if x:\n        rate = 2\n    return rate\n"
    analysis = analyse_source(plain)
    assert analysis is not None
    taken = Executed(frozenset({1, 2, 3, 4, 5}), frozenset({(-1, 2), (2, 3), (3, 4), (4, 5), (5, -1)}), {})
    judged = judge_file("f.py", analysis, taken)
    summary = summarise_coverage({"f.py": (3, 4)}, {"f.py": judged}, {"f.py": plain}, 90.0)
    assert summary.partial_branches == {"f.py": {3: (5,)}}  # every line ran, but never with a false x
    untaken = Executed(frozenset({1, 2, 3, 5}), frozenset({(-1, 2), (2, 3), (3, 5), (5, -1)}), {})
    summary = summarise_coverage(
        {"f.py": (3, 4)}, {"f.py": judge_file("f.py", analysis, untaken)}, {"f.py": plain}, 90.0
    )
    assert (summary.partial_branches, summary.uncovered) == ({}, {"f.py": (4,)})  # shown as an uncovered line


def test_a_file_the_run_never_saw_is_all_missing() -> None:
    summary = summarise_coverage({"m.py": (1,)}, {}, {"m.py": "x = 1\n"}, 90.0)
    assert (summary.executable, summary.covered) == (1, 0)
    assert isinstance(FileCoverage("m.py", frozenset(), frozenset()).missing_branches, dict)
