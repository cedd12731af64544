"""config.harness on real commits: each harness file, config sections, and coverage exclusions."""

from __future__ import annotations

import coverage.config
import pytest
from test_rules_support import findings, machine_change

from verifier.demo.scratch import ScratchRepo
from verifier.rules.harness import DEFAULT_PRAGMA, exclusion_patterns

PYPROJECT = '[project]\nname = "parcelkit"\nversion = "1.0"\n\n[tool.pytest.ini_options]\ntestpaths = ["tests"]\n'


@pytest.mark.parametrize(
    "path",
    [
        "conftest.py",
        "tests/conftest.py",
        "pytest.ini",
        ".coveragerc",
        "sitecustomize.py",
        "src/usercustomize.py",
        "parcelkit-hooks.pth",
    ],
)
def test_harness_files(repo: ScratchRepo, path: str) -> None:
    context = machine_change(repo, {"README.md": "x\n"}, {path: "import os\n"})
    assert [(f.path, f.line) for f in findings("config.harness", context)] == [(path, 1)]


def test_pytest_section_of_pyproject(repo: ScratchRepo) -> None:
    head = PYPROJECT + 'addopts = "-p no:randomly --deselect tests/test_rates.py"\n'
    found = findings("config.harness", machine_change(repo, {"pyproject.toml": PYPROJECT}, {"pyproject.toml": head}))
    assert [(f.line, f.details["added"]) for f in found] == [(7, [7])]
    assert "[tool.pytest.ini_options]" in found[0].message


def test_other_sections_of_pyproject_are_not_harness(repo: ScratchRepo) -> None:
    head = PYPROJECT.replace('version = "1.0"', 'version = "1.1"')
    context = machine_change(repo, {"pyproject.toml": PYPROJECT}, {"pyproject.toml": head})
    assert findings("config.harness", context) == []


def test_removed_coverage_lines_of_setup_cfg(repo: ScratchRepo) -> None:
    base = "[metadata]\nname = parcelkit\n\n[coverage:run]\nbranch = true\nsource = parcelkit\n"
    found = findings(
        "config.harness",
        machine_change(repo, {"setup.cfg": base}, {"setup.cfg": base.replace("source = parcelkit\n", "")}),
    )
    assert [(f.details["removed"], f.line) for f in found] == [([6], None)]


def test_tox_pytest_section(repo: ScratchRepo) -> None:
    base = "[tox]\nenvlist = py311\n\n[pytest]\naddopts = -q\n"
    context = machine_change(repo, {"tox.ini": base}, {"tox.ini": base + "norecursedirs = tests\n"})
    found = findings("config.harness", context)
    assert [f.line for f in found] == [6]


def test_default_pragma_is_coverage_pys_own() -> None:
    # Checked against coverage.py itself: its default exclusion regex (coverage.config.DEFAULT_EXCLUDE).
    assert DEFAULT_PRAGMA in coverage.config.DEFAULT_EXCLUDE


def test_pragma_on_a_machine_line(repo: ScratchRepo) -> None:
    base = {"parcelkit/rates.py": "def rate(w):\n    return 4.5 * w\n"}
    head = "def rate(w):\n    if w < 0:  # pragma: no cover\n        raise ValueError(w)\n    return 4.5 * w\n"
    found = findings("config.harness", machine_change(repo, base, {"parcelkit/rates.py": head}))
    assert [(f.path, f.line) for f in found] == [("parcelkit/rates.py", 2)]


def test_pragma_on_a_human_line_is_not_reported(repo: ScratchRepo) -> None:
    base = {"parcelkit/rates.py": "def rate(w):  # pragma: no cover\n    return 4.5 * w\n"}
    head = base["parcelkit/rates.py"] + "\n\nFLAT = 2.0\n"
    assert findings("config.harness", machine_change(repo, base, {"parcelkit/rates.py": head})) == []


def test_project_exclusion_pattern_read_at_base(repo: ScratchRepo) -> None:
    """The project's .coveragerc is untouched by the change: the rule reads it at the base revision."""
    base = {
        ".coveragerc": "[report]\nexclude_also =\n    raise NotImplementedError\n    ^\\s*if DEBUG:\n",
        "parcelkit/rates.py": "def rate(w):\n    return 4.5 * w\n",
    }
    head = "def rate(w):\n    if DEBUG:\n        print(w)\n    return 4.5 * w\n"
    found = findings("config.harness", machine_change(repo, base, {"parcelkit/rates.py": head}))
    assert [(f.line, f.details["pattern"]) for f in found] == [(2, r"^\s*if DEBUG:")]  # anchored: per line


def test_exclusion_patterns_from_each_config_format() -> None:
    configs = {
        "pyproject.toml": (
            '[tool.coverage.report]\nexclude_lines = ["if TYPE_CHECKING:"]\nexclude_also = ["@overload"]\n'
        ),
        "setup.cfg": "[coverage:report]\nexclude_lines =\n    def __repr__\n",
        "tox.ini": "[coverage:report]\nexclude_also = assert_never\n",
    }
    assert exclusion_patterns(configs) == ["if TYPE_CHECKING:", "@overload", "def __repr__", "assert_never"]
