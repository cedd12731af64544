"""Safety of test selection on real libraries: does the gate ever miss a failure the whole suite shows?

For each library (a real open-source project downloaded from PyPI as an sdist, its tests included), the
sdist becomes a commit, with a policy that leaves selection on as the shipped default does (the mutation
stage off: only the failing tests are compared). A setup commit then adds, in the library's own package
and test folder, the shapes of code the who-tests-what map cannot see directly, so that every library
has all of them (a few small modules written the way libraries write them):

* ``<package>/_formats.py`` loads output formats by name (``importlib.import_module`` of a computed name,
  and ``__import__``), from ``<package>/_format_csv.py`` and ``<package>/_format_tsv.py``, whose
  module-level constants some tests only read; it checks the name against ``<package>/_formats.json``, a
  data file the library reads;
* ``<package>/_cli.py`` is a small command line that ``test_command_line.py`` runs in a subprocess
  (``python -m``) beside one in-process test of its ``main``;
* ``conftest.py`` of the test folder gets fixtures (created, or appended to the library's own);
* ``<tests>/data/format_cases.json`` is a data file a test reads.

That commit is the base. Then, one at a time on top of it, model-style changes with one injected fault,
committed with the Model-Written trailer, of these kinds (``FAULT_KINDS``):

* ``operator``: a slip inside a function of the library (a comparison flipped, an off-by-one, a boolean
  swapped, ``and`` for ``or``);
* ``constant``: a module-level constant of the library changed (a number, a string, a flag);
* ``default``: a default argument's value changed;
* ``class-attribute``: a literal assigned in a class body changed;
* ``data-file``: a line of a data file the tests or the library read (the setup's, and the library's own);
* ``dynamic-import``: a constant or an operator of a module only reached by ``importlib``/``__import__``;
* ``subprocess``: a constant or an operator of the code the command-line tests run in a subprocess;
* ``fixture``: a value or an operator of a fixture in ``conftest.py``.

For each fault the script runs ``verifier check`` (observed selection; the base map is built once, then
cached) and, as the reference, plain ``pytest`` over the whole suite of the same tree exported fresh,
and compares the failing tests (a test file that fails to import, pytest's collection error, counts as
caught when the gate ran that file and did not pass; so does a failure of a file the gate ran when it
could not verify the run, exit 3). A failing test the gate ran and saw pass (one that depends on chance,
as a random-replacement cache's test does) is listed apart: the selection chose it. It prints each fault,
then per library, per kind and in total the faults, the failures of the whole suite, the failures the
gate missed (the bar: zero) and the share of the suite (as collected at base) the gate ran.

Usage: python benchmarks/bench_selection_safety.py [--per-kind KIND=N ...] [--results FILE] [requirement ...]
Needs the network for the downloads (PyPI only). Not run by CI. With the defaults (``FAULT_KINDS``, seed 14):
102 faults, about 10 minutes here with the namespace sandbox (each library's map built once).
"""

from __future__ import annotations

import argparse
import ast
import json
import random
import re
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from dataclasses import asdict, dataclass, field
from pathlib import Path

from bench_gate_overhead import fetch_sdist

from verifier.demo.scratch import ScratchRepo

# requirement -> (the package's folder, the test folder), both relative to the sdist's root
# Left out: more-itertools (its unittest subTest()s give several "call" reports per test under pytest 9,
# which the harness rejects as an incomplete run, so the gate never builds its map there) and idna (installed
# beside verifier, a dependency of requests: the harness puts the tree's folders after the installed packages,
# so in the namespace sandbox the installed idna shadows the tree's and the setup's modules are not found).
LIBRARIES = {
    "toolz==1.0.0": ("toolz", "toolz/tests"),
    "cachetools==5.5.0": ("src/cachetools", "tests"),
    "boltons==26.2.0": ("boltons", "tests"),
    "simplejson==3.19.3": ("simplejson", "simplejson/tests"),
}
POLICY = "selection:\n  run: observed\ncoverage:\n  threshold: 0\nrules:\n  tests.mutant-survived: ignore\n"
AGENT = "quill-assist/2.3"
SEED = 14
FAULT_KINDS = {  # kind -> faults per library (the default)
    "operator": 9,
    "constant": 4,
    "default": 4,
    "class-attribute": 3,
    "data-file": 2,
    "dynamic-import": 3,
    "subprocess": 3,
    "fixture": 2,
}
# (text in a line, replacement): the kinds of slip a model makes in a plausible-looking edit
OPERATOR_SLIPS = (
    (" == ", " != "),
    (" < ", " <= "),
    (" > ", " >= "),
    (" + 1", " + 2"),
    (" - 1", " - 2"),
    (" and ", " or "),
    ("return True", "return False"),
    ("return False", "return True"),
    (" is None", " is not None"),
    (" not in ", " in "),
)


# -- the setup commit: the shapes the map cannot see, in the library's own folders --------------------------------

FORMATS_MODULE = '''"""Output formats, looked up by name: ``load_format("csv")`` imports the ``_format_csv`` module."""

import importlib
import json
from pathlib import Path

KNOWN = Path(__file__).with_name("_formats.json")


def known_formats():
    return json.loads(KNOWN.read_text(encoding="utf-8"))["formats"]


def load_format(name):
    if name not in known_formats():
        raise LookupError(f"no output format {name!r}")
    return importlib.import_module(__package__ + "._format_" + name)


def load_legacy(name):
    """The same for callers of the old interface (``__import__``, as older plugin loaders do)."""
    return __import__(__package__ + "._format_" + name, fromlist=["render"])
'''
FORMATS_DATA = '{\n  "formats": [\n    "csv",\n    "tsv"\n  ],\n  "version": 2\n}\n'
FORMAT_MODULE = '''"""{title} rows."""

SEPARATOR = {separator!r}
QUOTE = '"'
MAX_FIELDS = 8


def render(row):
    fields = [str(value) for value in row[:MAX_FIELDS]]
    if len(fields) > 0 and any(SEPARATOR in field for field in fields):
        fields = [QUOTE + field + QUOTE for field in fields]
    return SEPARATOR.join(fields)
'''
CLI_MODULE = '''"""A small command line: ``python -m {module}._cli 3 1 2`` prints how many numbers and their range."""

import sys

EMPTY = "empty"


def main(argv):
    numbers = [int(argument) for argument in argv]
    if len(numbers) == 0:
        return EMPTY
    ordered = sorted(numbers)
    return f"{{len(ordered)}}: {{ordered[0]}}..{{ordered[-1]}}"


if __name__ == "__main__":
    print(main(sys.argv[1:]))
'''
FORMATS_TEST = '''"""The output formats, loaded by name."""

import json
from pathlib import Path

from {module}._formats import known_formats, load_format, load_legacy

CASES = json.loads((Path(__file__).parent / "data" / "format_cases.json").read_text(encoding="utf-8"))


def test_csv_renders_the_cases():
    csv = load_format("csv")
    for row, text in CASES["csv"]:
        assert csv.render(row) == text


def test_csv_separator_is_a_comma():
    assert load_format("csv").SEPARATOR == ","


def test_csv_caps_the_fields():
    assert load_format("csv").MAX_FIELDS == 8


def test_tsv_renders_the_cases():
    for row, text in CASES["tsv"]:
        assert load_legacy("tsv").render(row) == text


def test_tsv_separator_is_a_tab():
    assert load_legacy("tsv").SEPARATOR == "\\t"


def test_known_formats():
    assert known_formats() == ["csv", "tsv"]


def test_rows_from_the_fixture(sample_rows, row_width):
    assert len(load_format("csv").render(sample_rows[0]).split(",")) == row_width


def test_quoted_rows_from_the_fixture(sample_rows, quoted_row):
    assert load_format("csv").render(sample_rows[1]) == quoted_row
'''
FORMAT_CASES = (
    '{\n  "csv": [\n    [[1, 2, 3], "1,2,3"],\n    [["a", "b,c"], "\\"a\\",\\"b,c\\""]\n  ],\n'
    '  "tsv": [\n    [[1, 2], "1\\t2"],\n    [["x"], "x"]\n  ]\n}\n'
)
CLI_TEST = '''"""The command line, in process and as a command."""

import os
import subprocess
import sys
from pathlib import Path

import {module}
from {module}._cli import main

ROOT = str(Path({module}.__file__).resolve().parent.parent)


def run_command(*arguments):
    environment = dict(os.environ, PYTHONPATH=os.pathsep.join([ROOT, os.environ.get("PYTHONPATH", "")]))
    done = subprocess.run(
        [sys.executable, "-m", "{module}._cli", *arguments], capture_output=True, text=True, env=environment
    )
    assert done.returncode == 0, done.stderr
    return done.stdout.strip()


def test_main_counts_the_numbers():
    assert main(["3", "1", "2"]).startswith("3:")


def test_command_prints_the_range():
    assert run_command("3", "1", "2") == "3: 1..3"


def test_command_without_numbers():
    assert run_command() == "empty"
'''
CONFTEST_FIXTURES = """

import pytest as _pytest


@_pytest.fixture
def sample_rows():
    return [[1, 2, 3], ["a", "b,c"]]


@_pytest.fixture
def row_width():
    return 3


@_pytest.fixture
def quoted_row(sample_rows):
    return ",".join('"' + str(value) + '"' for value in sample_rows[1])
"""


def setup_commit(repo: ScratchRepo, package: str, tests: str) -> None:
    """Add the shapes the map cannot see directly to the library (see the module's docstring)."""
    module = package.rpartition("/")[2]
    root = repo.path
    files = {
        f"{package}/_formats.py": FORMATS_MODULE,
        f"{package}/_formats.json": FORMATS_DATA,
        f"{package}/_format_csv.py": FORMAT_MODULE.format(title="Comma-separated", separator=","),
        f"{package}/_format_tsv.py": FORMAT_MODULE.format(title="Tab-separated", separator="\t"),
        f"{package}/_cli.py": CLI_MODULE.format(module=module),
        f"{tests}/test_output_formats.py": FORMATS_TEST.format(module=module),
        f"{tests}/data/format_cases.json": FORMAT_CASES,
        f"{tests}/test_command_line.py": CLI_TEST.format(module=module),
    }
    for path, text in files.items():
        (root / path).parent.mkdir(parents=True, exist_ok=True)
        (root / path).write_text(text, encoding="utf-8")
    conftest = root / tests / "conftest.py"
    existing = conftest.read_text(encoding="utf-8") if conftest.exists() else '"""Fixtures of the tests."""\n'
    conftest.write_text(existing.rstrip("\n") + "\n" + CONFTEST_FIXTURES, encoding="utf-8")
    repo.git("add", "-A")
    repo.git("commit", "-q", "-m", "Output formats by name, a command line, and their tests")


# -- the faults -------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Fault:
    kind: str
    path: str
    line: int
    old: str
    new: str


def library_sources(root: Path, package: str) -> list[Path]:
    """The library's own Python files (the setup's left out): not tests, not packaging or docs helpers."""
    skip = re.compile(
        r"(^|/)(tests?|docs?|benchmarks?|examples?)/|(^|/)(setup|versioneer|conftest)\.py$|/_(format|cli)"
    )
    return [
        p
        for p in sorted((root / package).rglob("*.py"))
        if not skip.search(p.relative_to(root).as_posix()) and not p.name.startswith("test_")
    ]


def parse(file: Path) -> tuple[list[str], ast.Module] | None:
    text = file.read_text(encoding="utf-8", errors="replace")
    try:
        return text.split("\n"), ast.parse(text)
    except SyntaxError:
        return None


def operator_slips(root: Path, file: Path, kind: str, in_functions_only: bool) -> Iterator[Fault]:
    parsed = parse(file)
    if parsed is None:
        return
    rows, tree = parsed
    body_lines = {
        line
        for node in ast.walk(tree)
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef))
        for line in range(node.body[0].lineno, (node.end_lineno or 0) + 1)
    }
    strings = {
        line
        for node in ast.walk(tree)
        if isinstance(node, ast.Constant) and isinstance(node.value, str)
        for line in range(node.lineno, (node.end_lineno or node.lineno) + 1)
    }
    for number, row in enumerate(rows, start=1):
        if row.lstrip().startswith("#") or number in strings or (in_functions_only and number not in body_lines):
            continue
        for old, new in OPERATOR_SLIPS:
            if old in row:
                yield Fault(kind, file.relative_to(root).as_posix(), number, row, row.replace(old, new, 1))
                break


def changed_literal(value: object) -> object | None:
    """A plausible wrong value for a literal: a flag flipped, a number off by one, a string edited."""
    if isinstance(value, bool):
        return not value
    if isinstance(value, int):
        return value + 1
    if isinstance(value, float):
        return value * 2 or 1.0
    if isinstance(value, str) and len(value) < 40 and "\n" not in value:
        return value[:-1] if len(value) > 1 else value + "_"
    return None


def literal_fault(root: Path, file: Path, rows: list[str], node: ast.expr, kind: str) -> Fault | None:
    """The fault that replaces the literal ``node`` (one line, ASCII) by a changed value."""
    if not isinstance(node, ast.Constant) or node.end_lineno != node.lineno or node.end_col_offset is None:
        return None
    row = rows[node.lineno - 1]
    new_value = changed_literal(node.value)
    if new_value is None or not row.isascii() or row.lstrip().startswith(("f'", 'f"')):
        return None
    new_row = row[: node.col_offset] + repr(new_value) + row[node.end_col_offset :]
    return Fault(kind, file.relative_to(root).as_posix(), node.lineno, row, new_row)


def module_constants(root: Path, file: Path, kind: str = "constant") -> Iterator[Fault]:
    parsed = parse(file)
    if parsed is None:
        return
    rows, tree = parsed
    for statement in tree.body:
        value = statement.value if isinstance(statement, (ast.Assign, ast.AnnAssign)) else None
        if value is not None and not _dunder_target(statement):
            fault = literal_fault(root, file, rows, value, kind)
            if fault:
                yield fault


def _dunder_target(statement: ast.stmt) -> bool:
    targets = statement.targets if isinstance(statement, ast.Assign) else [getattr(statement, "target", None)]
    return any(isinstance(t, ast.Name) and t.id.startswith("__") for t in targets)


def default_arguments(root: Path, file: Path) -> Iterator[Fault]:
    parsed = parse(file)
    if parsed is None:
        return
    rows, tree = parsed
    for node in ast.walk(tree):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
            for default in [*node.args.defaults, *(d for d in node.args.kw_defaults if d is not None)]:
                fault = literal_fault(root, file, rows, default, "default")
                if fault:
                    yield fault


def class_attributes(root: Path, file: Path) -> Iterator[Fault]:
    parsed = parse(file)
    if parsed is None:
        return
    rows, tree = parsed
    for node in ast.walk(tree):
        if isinstance(node, ast.ClassDef):
            for statement in node.body:
                value = statement.value if isinstance(statement, (ast.Assign, ast.AnnAssign)) else None
                if value is not None and not _dunder_target(statement):
                    fault = literal_fault(root, file, rows, value, "class-attribute")
                    if fault:
                        yield fault


def every_literal(root: Path, file: Path, kind: str) -> Iterator[Fault]:
    """Any literal of a (small, setup) file but docstrings and f-string parts."""
    parsed = parse(file)
    if parsed is None:
        return
    rows, tree = parsed
    skip = {id(n.value) for n in ast.walk(tree) if isinstance(n, ast.Expr)}
    skip |= {id(part) for n in ast.walk(tree) if isinstance(n, ast.JoinedStr) for part in n.values}
    for node in ast.walk(tree):
        if isinstance(node, ast.Constant) and id(node) not in skip:
            fault = literal_fault(root, file, rows, node, kind)
            if fault:
                yield fault


def data_file_edits(root: Path, file: Path) -> Iterator[Fault]:
    """A character of a line changed: a digit to the next, a letter's case swapped."""
    try:
        rows = file.read_text(encoding="utf-8").split("\n")
    except (UnicodeDecodeError, OSError):
        return
    for number, row in enumerate(rows, start=1):
        found = re.search(r"[0-9A-Za-z]", row)
        if found and row.isascii():
            char = found.group()
            new = str((int(char) + 1) % 10) if char.isdigit() else char.swapcase()
            yield Fault(
                "data-file",
                file.relative_to(root).as_posix(),
                number,
                row,
                row[: found.start()] + new + row[found.end() :],
            )


def candidates(root: Path, package: str, tests: str) -> dict[str, list[Fault]]:
    """Every fault of each kind this library offers."""
    sources = library_sources(root, package)
    setup_dynamic = [root / package / name for name in ("_formats.py", "_format_csv.py", "_format_tsv.py")]
    data_files = [
        p
        for p in sorted((root / tests).rglob("*"))
        if p.is_file() and p.suffix not in (".py", ".pyc") and not p.name.startswith(".")
    ] + [root / package / "_formats.json"]
    found: dict[str, list[Fault]] = {
        "operator": [f for s in sources for f in operator_slips(root, s, "operator", True)],
        "constant": [f for s in sources for f in module_constants(root, s)],
        "default": [f for s in sources for f in default_arguments(root, s)],
        "class-attribute": [f for s in sources for f in class_attributes(root, s)],
        "data-file": [f for d in data_files for f in data_file_edits(root, d)],
        "dynamic-import": [
            f
            for s in setup_dynamic
            for f in [*every_literal(root, s, "dynamic-import"), *operator_slips(root, s, "dynamic-import", False)]
        ],
        "subprocess": [
            *every_literal(root, root / package / "_cli.py", "subprocess"),
            *operator_slips(root, root / package / "_cli.py", "subprocess", False),
        ],
        "fixture": [
            *every_literal(root, root / tests / "conftest.py", "fixture"),
            *operator_slips(root, root / tests / "conftest.py", "fixture", False),
        ],
    }
    return found


def choose(found: dict[str, list[Fault]], per_kind: dict[str, int], rng: random.Random) -> list[Fault]:
    """Up to ``per_kind[kind]`` faults of each kind, data files spread over the files there are."""
    chosen: list[Fault] = []
    for kind, wanted in per_kind.items():
        pool = found.get(kind, [])
        if kind == "data-file":
            by_file: dict[str, list[Fault]] = {}
            for fault in pool:
                by_file.setdefault(fault.path, []).append(fault)
            picks = [rng.choice(group) for group in by_file.values()]
            rng.shuffle(picks)
            chosen += picks[:wanted]
        else:
            chosen += rng.sample(pool, min(wanted, len(pool)))
    return chosen


def commit_fault(repo: ScratchRepo, base: str, fault: Fault) -> str:
    repo.git("checkout", "-q", "--detach", base)
    target = repo.path / fault.path
    rows = target.read_text(encoding="utf-8").split("\n")
    rows[fault.line - 1] = fault.new
    target.write_text("\n".join(rows), encoding="utf-8")
    repo.git("add", "-A")
    message = f"Tidy {fault.path}\n\nModel-Written: {AGENT}\n"
    repo.git("commit", "-q", "-F", "-", input=message.encode())
    return repo.head()


# -- the two sides --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class GateRun:
    """What ``verifier check`` of one fault did: its failing tests, the tests it ran, the map, the selection."""

    failing: set[str]
    ran: int
    map_status: str
    whole_suite: bool
    selected_files: set[str]  # the test files it ran tests of (all of them for a whole-suite run)
    verdict: str
    ran_ids: set[str]  # the tests it ran, with any outcome

    def catches(self, failure: str) -> bool:
        """A failing test of the whole suite the gate saw fail; or one of a test file the gate ran when it
        could not verify the run (exit 3, a collection error, say: fail closed, never a pass); a test file
        that failed to import (no test of it ran) counts when the gate ran it and did not pass."""
        if failure in self.failing:
            return True
        path = failure.split("::")[0]
        ran_file = self.whole_suite or any(
            f == path or (f.startswith(path) and path.endswith("/")) for f in self.selected_files
        )
        file_level = "::" not in failure
        return ran_file and (self.verdict == "error" or (file_level and self.verdict == "block"))


def gate_failures(repo: ScratchRepo, sha: str, out: Path) -> GateRun:
    """What ``verifier check`` of ``sha`` did (its JSON report)."""
    report_file = out / f"gate-{sha[:12]}.json"
    command = [sys.executable, "-m", "verifier", "-C", str(repo.path), "check", sha, "--quiet", "--no-notes"]
    done = subprocess.run(
        [*command, "--format", "json", "--output", str(report_file)],
        capture_output=True,
        text=True,
    )
    if not report_file.exists():
        raise SystemExit(f"the gate wrote no report (exit {done.returncode}): {done.stderr[-2000:]}")
    report = json.loads(report_file.read_text())
    tests = report.get("tests", {})
    selection = report.get("selection") or {}
    return GateRun(
        failing=set(tests.get("failed_ids", [])),
        ran=int(tests.get("run", 0)),
        map_status=str(selection.get("map", "?")),
        whole_suite=bool(selection.get("whole_suite")),
        selected_files={key.split("::")[0] for key in selection.get("selected", {})},
        verdict=str(report.get("verdict")),
        ran_ids={outcome["node_id"] for outcome in tests.get("outcomes", [])},
    )


def suite_failures(repo: ScratchRepo, sha: str, out: Path) -> tuple[set[str], int]:
    """The reference: plain pytest over the whole suite of a fresh export of ``sha``."""
    tree = out / f"tree-{sha[:12]}"
    tree.mkdir()
    archive = subprocess.run(["git", "archive", sha], cwd=repo.path, capture_output=True, check=True).stdout
    subprocess.run(["tar", "-x", "-C", str(tree)], input=archive, check=True)
    junit = out / f"junit-{sha[:12]}.xml"
    subprocess.run(
        [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "--rootdir=.", f"--junitxml={junit}", "-rfE"],
        cwd=tree,
        capture_output=True,
        text=True,
        env={"PATH": "/usr/bin:/bin", "PYTHONPATH": ".:src", "PYTHONHASHSEED": "0"},
    )
    found = _junit_failures(junit, tree)
    subprocess.run(["rm", "-rf", str(tree)], check=False)
    return found


def _junit_failures(junit: Path, tree: Path) -> tuple[set[str], int]:
    import xml.etree.ElementTree as ElementTree

    failed, total = set(), 0
    for case in ElementTree.parse(junit).iter("testcase"):
        total += 1
        if case.find("failure") is not None or case.find("error") is not None:
            failed.add(_node_id(case.get("classname", ""), case.get("name", ""), tree))
    return failed, total


def _node_id(classname: str, name: str, tree: Path) -> str:
    """JUnit's dotted classname back to pytest's node id: the longest prefix that is a file of the tree; a
    collection error (no classname, the module's dotted name) becomes the test file's or folder's path."""
    if not classname:  # a test file's path, or a folder's (a conftest.py that fails stops its whole folder)
        path = name.replace(".", "/")
        return f"{path}.py" if (tree / f"{path}.py").is_file() else f"{path}/" if (tree / path).is_dir() else name
    parts = classname.split(".")
    for cut in range(len(parts), 0, -1):
        path = "/".join(parts[:cut]) + ".py"
        if (tree / path).is_file():
            return "::".join([path, *parts[cut:], name])
    return f"{classname}::{name}"


# -- the run --------------------------------------------------------------------------------------------------


@dataclass
class Tally:
    faults: int = 0
    failures: int = 0
    missed: int = 0
    shares: list[float] = field(default_factory=list)
    differing: int = 0  # failures of tests the gate ran and saw pass (a test that depends on chance)

    def add(self, failures: int, missed: int, share: float, differing: int = 0) -> None:
        self.faults += 1
        self.failures += failures
        self.missed += missed
        self.shares.append(share)
        self.differing += differing

    def line(self, name: str) -> str:
        mean = sum(self.shares) / len(self.shares) if self.shares else 0.0
        low, high = (min(self.shares), max(self.shares)) if self.shares else (0.0, 0.0)
        return (
            f"{name:<24} faults {self.faults:>3}  failures {self.failures:>4}  missed {self.missed:>3}  "
            f"tests run: mean {mean:.1%} (min {low:.1%}, max {high:.1%})"
            + (f"  (+{self.differing} run by the gate, passed there)" if self.differing else "")
        )


def run_library(
    requirement: str, scratch: Path, per_kind: dict[str, int], rng: random.Random, results: list[dict]
) -> tuple[Tally, dict[str, Tally]]:
    package, tests = LIBRARIES.get(requirement, (requirement.split("==")[0].replace("-", "_"), "tests"))
    folder = scratch / requirement.replace("=", "_")
    project = fetch_sdist(requirement, folder / "sdist")
    (project / "verifier.yaml").write_text(POLICY)
    repo = ScratchRepo(project)
    repo.git("add", "-A")
    repo.git("commit", "-q", "-m", f"Import {requirement}")
    setup_commit(repo, package, tests)
    base = repo.head()
    found = candidates(project, package, tests)
    chosen = choose(found, per_kind, rng)
    offered = ", ".join(f"{kind} {len(found[kind])}" for kind in per_kind)
    print(f"\n{requirement}: {len(chosen)} faults injected (candidates: {offered})", flush=True)
    failing_at_base, size = suite_failures(repo, base, folder)  # the share of tests run is of this suite
    print(f"  the whole suite at base: {size} tests, {len(failing_at_base)} failing", flush=True)
    tally, by_kind = Tally(), {kind: Tally() for kind in per_kind}
    for fault in chosen:
        sha = commit_fault(repo, base, fault)
        started = time.monotonic()
        gate = gate_failures(repo, sha, folder)
        full, suite_size = suite_failures(repo, sha, folder)
        not_caught = {failure for failure in full if not gate.catches(failure)}
        differing = not_caught & gate.ran_ids  # run by the gate and passed there: not a selection miss
        missed = not_caught - differing
        ran, why = gate.ran, "whole suite" if gate.whole_suite else "selected"
        share = min(ran / size, 1.0) if size else 0.0
        tally.add(len(full), len(missed), share, len(differing))
        by_kind[fault.kind].add(len(full), len(missed), share, len(differing))
        print(f"  [{fault.kind}] {fault.path}:{fault.line} {fault.old.strip()!r} -> {fault.new.strip()!r}")
        print(
            f"    suite: {len(full)} failing of {suite_size}; gate ({why}, map {gate.map_status}): ran {ran} "
            f"({share:.1%}), {len(gate.failing)} failing; missed {len(missed)}  [{time.monotonic() - started:.0f} s]",
            flush=True,
        )
        for test in sorted(missed):
            print(f"    MISSED {test}", flush=True)
        for test in sorted(differing):
            print(f"    SAME TEST, OTHER OUTCOME (the gate ran it, it passed there) {test}", flush=True)
        results.append(
            {**asdict(fault), "library": requirement, "suite_failing": sorted(full), "missed": sorted(missed)}
            | {"differing": sorted(differing)}
            | {"gate_failing": sorted(gate.failing), "ran": ran, "suite_size": size, "verdict": gate.verdict}
        )
    return tally, by_kind


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("requirements", nargs="*", default=list(LIBRARIES))
    parser.add_argument("--per-kind", action="append", default=[], metavar="KIND=N", help="faults per library")
    parser.add_argument("--results", type=Path, help="write every fault's outcome here (JSON)")
    arguments = parser.parse_args()
    per_kind = dict(FAULT_KINDS)
    for setting in arguments.per_kind:
        kind, _, count = setting.partition("=")
        if kind not in per_kind or not count.isdigit():
            raise SystemExit(f"--per-kind {setting!r}: expected KIND=N with KIND one of {', '.join(per_kind)}")
        per_kind[kind] = int(count)
    rng = random.Random(SEED)
    total, kinds = Tally(), {kind: Tally() for kind in per_kind}
    libraries: dict[str, Tally] = {}
    results: list[dict] = []
    with tempfile.TemporaryDirectory(prefix="bench-safety-") as scratch:
        for requirement in arguments.requirements:
            tally, by_kind = run_library(requirement, Path(scratch), per_kind, rng, results)
            libraries[requirement] = tally
            for kind, counted in by_kind.items():
                kinds[kind].faults += counted.faults
                kinds[kind].failures += counted.failures
                kinds[kind].missed += counted.missed
                kinds[kind].shares += counted.shares
                kinds[kind].differing += counted.differing
            total.faults += tally.faults
            total.failures += tally.failures
            total.missed += tally.missed
            total.shares += tally.shares
            total.differing += tally.differing
            if arguments.results:
                arguments.results.write_text(json.dumps(results, indent=1))
    print("\nper library:")
    for requirement, tally in libraries.items():
        print("  " + tally.line(requirement))
    print("per kind:")
    for kind, tally in kinds.items():
        print("  " + tally.line(kind))
    print("  " + total.line("total"))
    verdict = "met" if total.missed == 0 else "NOT met"
    print(f"\nfailures missed by the gate: {total.missed} of {total.failures} (bar: 0) -> {verdict}")


if __name__ == "__main__":
    main()
