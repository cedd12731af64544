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


@pytest.mark.parametrize(
    "path", ["pytest.toml", ".pytest.toml", "sub/.pytest.toml", ".gitattributes", "src/.gitattributes"]
)
def test_newer_pytest_config_files_and_git_attributes(repo: ScratchRepo, path: str) -> None:
    context = machine_change(repo, {"README.md": "x\n"}, {path: "[pytest]\naddopts = '--deselect tests/test_a.py'\n"})
    assert [(f.path, f.line) for f in findings("config.harness", context)] == [(path, 1)]


def test_every_pytest_config_name_is_known() -> None:
    """Checked against the installed pytest itself: the file names its locate_config() looks for, read
    from its own source (_pytest/config/findpaths.py), are all harness files or config sections we read."""
    import ast
    import inspect

    from _pytest.config import findpaths

    from verifier.rules.harness import COVERAGE_CONFIGS, HARNESS_FILES, PYTEST_CONFIGS

    if hasattr(findpaths, "CONFIG_LOADERS_BY_NAME"):  # pytest 9.1 and later: one table of names and loaders
        names = list(findpaths.CONFIG_LOADERS_BY_NAME)
    else:  # earlier: a list literal inside locate_config()
        tree = ast.parse(inspect.getsource(findpaths.locate_config))
        names = next(
            [ast.literal_eval(element) for element in node.value.elts]
            for node in ast.walk(tree)
            if isinstance(node, ast.Assign)
            and getattr(node.targets[0], "id", "") == "config_names"
            and isinstance(node.value, ast.List)
        )
    assert tuple(names) == PYTEST_CONFIGS
    whole_files = {glob.removeprefix("**/") for glob in HARNESS_FILES}
    sections_read = {"pyproject.toml", "tox.ini", "setup.cfg"}
    assert set(names) <= whole_files | sections_read
    # coverage.py's config files (coverage.py docs, "Configuration reference"; config.py's config_files)
    assert set(COVERAGE_CONFIGS) <= whole_files | sections_read
    assert "conftest.py" in whole_files


@pytest.mark.parametrize(
    "header",
    ["[ tool . pytest . ini_options ]", '[tool."pytest".ini_options]', "[ 'tool' .\"pytest\" . ini_options ]"],
)
def test_toml_headers_with_spaces_and_quotes(repo: ScratchRepo, header: str) -> None:
    """TOML allows whitespace around the dots of a table name and quoted keys (TOML 1.0, "Table")."""
    base = '[project]\nname = "parcelkit"\n'
    head = base + f'\n{header}\naddopts = "--deselect tests/test_rates.py::test_base"\n'
    found = findings("config.harness", machine_change(repo, {"pyproject.toml": base}, {"pyproject.toml": head}))
    assert [f.path for f in found] == ["pyproject.toml"]


def test_dotted_keys_outside_a_header(repo: ScratchRepo) -> None:
    base = '[project]\nname = "parcelkit"\n\n[tool]\n'
    head = base + 'pytest . ini_options . addopts = "-k not_rates"\n'
    found = findings("config.harness", machine_change(repo, {"pyproject.toml": base}, {"pyproject.toml": head}))
    assert [f.path for f in found] == ["pyproject.toml"]


@pytest.mark.parametrize(
    "path", ["json.py", "subprocess.py", "coverage/__init__.py", "pytest.py", "src/xdist.py", "tests/json.py"]
)
def test_top_level_module_shadowing_a_tool_or_the_standard_library(repo: ScratchRepo, path: str) -> None:
    context = machine_change(repo, {"README.md": "x\n"}, {path: "VALUE = 1\n"})
    module = path.split("/")[-2] if path.endswith("/__init__.py") else path.split("/")[-1].removesuffix(".py")
    found = findings("config.harness", context)
    assert [(f.path, f.details.get("module")) for f in found] == [(path, module)]


@pytest.mark.parametrize("path", ["parcelkit/json.py", "parcelkit/types.py", "parcelkit/rates_json.py"])
def test_module_inside_a_package_shadows_nothing(repo: ScratchRepo, path: str) -> None:
    context = machine_change(repo, {"parcelkit/__init__.py": ""}, {path: "VALUE = 1\n"})
    assert findings("config.harness", context) == []


def test_the_standard_library_names_come_from_python() -> None:
    """Outside check: the standard module names are the interpreter's own (sys.stdlib_module_names)."""
    import sys

    from verifier.rules.harness import shadows

    assert all(shadows(name) for name in ("json", "subprocess", "os", "pytest", "coverage", "xdist"))
    assert "json" in sys.stdlib_module_names and not shadows("parcelkit")
