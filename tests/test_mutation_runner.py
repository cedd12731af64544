"""The in-sandbox mutant runner, through a real sandbox backend with real pytest: killed, survived,
timeout, crashed, module-level mutants in a fresh interpreter, decorated functions, and hostile results."""

from __future__ import annotations

import hashlib
import importlib.util
import json
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from verifier.models import Limits, Mutant, Policy
from verifier.mutation import stage
from verifier.mutation.operators import FileMutator
from verifier.sandbox.process import ProcessBackend

CALC = """\
import functools
import os

RATE = 3


def double(x):
    return x * 2


def spin(n):
    i = 0
    while i < n:
        i += 1
    return i


def guard(code):
    if code != 0:
        os._exit(code)
    return "ok"


def depth(n):
    if n <= 0:
        return 0
    return 1 + depth(n - 1)


def logged(function):
    @functools.wraps(function)
    def wrapper(*args):
        return function(*args)

    return wrapper


@logged
def triple(x):
    return x * RATE


class Meter:
    @property
    def reading(self):
        return 7

    @staticmethod
    def scale(x):
        return x + 1
"""

TESTS = """\
from pathlib import Path

from shop import calc


def test_double_strong():
    assert calc.double(3) == 6


def test_double_weak():
    calc.double(3)


def test_file_on_disk_is_the_original():
    assert "return x * 2" in Path("shop/calc.py").read_text()


def test_spin():
    assert calc.spin(3) == 3


def test_guard():
    assert calc.guard(0) == "ok"


def test_depth():
    assert calc.depth(3) == 3


def test_triple():
    assert calc.triple(2) == 6


def test_triple_weak():
    calc.triple(2)


def test_reading():
    assert calc.Meter().reading == 7


def test_scale():
    assert calc.Meter.scale(1) == 2
"""

T = "tests/test_calc.py::"


@pytest.fixture
def tree(tmp_path: Path) -> Path:
    folder = tmp_path / "tree"
    (folder / "shop").mkdir(parents=True)
    (folder / "tests").mkdir()
    (folder / "shop" / "__init__.py").write_text("")
    (folder / "shop" / "calc.py").write_text(CALC)
    (folder / "tests" / "test_calc.py").write_text(TESTS)
    return folder


def mutant(line_text: str, mutated: str) -> Mutant:
    """The operators' mutant of the line holding ``line_text`` whose text is ``mutated``."""
    mutator = FileMutator(CALC, "shop/calc.py")
    line = next(n for n, row in enumerate(CALC.split("\n"), 1) if line_text in row)
    for proposal in mutator.proposals(line):
        rendered = mutator.render(proposal)
        if rendered is not None and rendered.mutated.strip() == mutated:
            return rendered
    raise AssertionError(f"no mutant {mutated!r} of line {line}")


def run(tree: Path, planned: list[tuple[Mutant, tuple[str, ...]]], limit: float | None = None) -> list[dict]:
    """Run the planned mutants through the process sandbox; return the runner's raw records, in plan order."""
    policy = Policy(source="test", limits=Limits(wall_seconds=120))
    pending = [(number, m, tests) for number, (m, tests) in enumerate(planned)]
    request = stage.prepare(tree, policy, pending, {})
    if limit is not None:
        plan_file = tree / stage.WORK_DIR / "plan.json"
        plan = json.loads(plan_file.read_text())
        for entry in plan["mutants"]:
            entry["limit"] = limit
        plan_file.write_text(json.dumps(plan))
    result = ProcessBackend().run(request)
    data = result.files.get(stage.RESULTS)
    assert data, result.output
    records = {r["id"]: r for r in map(json.loads, data.decode().splitlines())}
    checked = stage.read_results(data, set(records))
    assert set(checked) == set(records)  # every record the runner wrote passes the host's validation
    return [records[f"m{number}"] for number in range(len(planned))]


def digest(folder: Path) -> dict[str, str]:
    return {
        str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file() and stage.WORK_DIR not in p.parts
    }


def test_killed_and_survived_with_swapped_code(tree: Path) -> None:
    before = digest(tree)
    wrong_double = mutant("return x * 2", "return x / 2")
    records = run(
        tree,
        [
            (wrong_double, (T + "test_double_weak", T + "test_double_strong")),
            (wrong_double, (T + "test_file_on_disk_is_the_original", T + "test_double_weak")),
        ],
    )
    assert records[0]["status"] == "killed" and records[0]["killed_by"] == T + "test_double_strong"
    assert records[0]["how"] == "fork"
    # The mutant was live (the first try proves it) while the file on disk still held the original text.
    assert records[1]["status"] == "survived"
    assert digest(tree) == before  # nothing of a mutant was written to the tree


FORGER = """\
import atexit
import json

from shop import calc


def forge():
    with open(".verifier-mutation/out/results.jsonl", "a") as results:
        for number in range(5):
            results.write(json.dumps({"id": f"m{number}", "status": "killed", "how": "fork"}) + "\\n")


forge()  # while the runner collects
atexit.register(forge)  # after the runner wrote its results


def test_forges_kills():
    forge()  # while the mutant runs
    calc.double(3)
"""


def test_results_a_test_writes_are_not_taken(tree: Path) -> None:
    """An attacker's test appends fake kills to the results file at import, during its run and at exit."""
    (tree / "tests" / "test_forger.py").write_text(FORGER)
    [record] = run(tree, [(mutant("return x * 2", "return x / 2"), ("tests/test_forger.py::test_forges_kills",))])
    assert record["status"] == "survived"


def test_endless_loop_is_a_timeout(tree: Path) -> None:
    [record] = run(tree, [(mutant("i += 1", "pass"), (T + "test_spin",))], limit=2.0)
    assert record["status"] == "timeout"


def test_a_mutant_that_ends_the_interpreter_is_crashed(tree: Path) -> None:
    # ``code != 0`` -> ``code == 0`` makes guard(0) call os._exit(0): the child ends without a result.
    [record] = run(tree, [(mutant("if code != 0:", "if code == 0:"), (T + "test_guard",))])
    assert record["status"] == "crashed"


def test_endless_recursion_is_killed(tree: Path) -> None:
    # ``n <= 0`` -> ``n < 0``: depth(3) recurses past 0 until Python's RecursionError fails the test.
    [record] = run(tree, [(mutant("if n <= 0:", "if n < 0:"), (T + "test_depth",))])
    assert record["status"] == "killed"


def test_decorated_property_and_static_method_are_swapped(tree: Path) -> None:
    records = run(
        tree,
        [
            (mutant("return x * RATE", "return x / RATE"), (T + "test_triple",)),
            (mutant("return x * RATE", "return x / RATE"), (T + "test_triple_weak",)),
            (mutant("return 7", "return 0"), (T + "test_reading",)),
            (mutant("return x + 1", "return x - 1"), (T + "test_scale",)),
        ],
    )
    assert [r["status"] for r in records] == ["killed", "survived", "killed", "killed"]
    assert all(r["how"] == "fork" for r in records)


def test_module_level_line_runs_in_a_fresh_interpreter(tree: Path) -> None:
    records = run(
        tree,
        [
            (mutant("RATE = 3", "RATE = 0"), (T + "test_triple",)),
            (mutant("RATE = 3", "RATE = 0"), (T + "test_triple_weak",)),
        ],
    )
    assert [(r["status"], r["how"]) for r in records] == [("killed", "fresh"), ("survived", "fresh")]


def test_mismatched_text_and_unknown_tests_are_errors_never_kills(tree: Path) -> None:
    stale = Mutant("shop/calc.py", 8, 8, "arithmetic", "    return x + 2", "    return x - 2", "double", (8,))
    records = run(
        tree,
        [(stale, (T + "test_double_strong",)), (mutant("return x * 2", "return x / 2"), (T + "test_gone",))],
    )
    assert [r["status"] for r in records] == ["error", "error"]


def test_hostile_results_are_refused() -> None:
    expected = {"m0", "m1"}
    lines = [
        b'{"id": "m0", "status": "survived", "killed_by": "' + b"x" * 5000 + b'"}',
        b'{"id": "m0", "status": "killed"}',  # a second record of one id does not overwrite the first
        b'{"id": "m1", "status": "passed-really"}',  # not a status the runner may report
        b'{"id": "m9", "status": "killed"}',  # not in the plan
        b"[1, 2]",
        b"not json",
    ]
    records = stage.read_results(b"\n".join(lines), expected)
    assert set(records) == {"m0"}
    assert records["m0"][0] == "survived" and len(records["m0"][1] or "") == 500
    assert stage.read_results(b"x" * (stage.RESULTS_CAP + 1), expected) == {}


def test_runner_imports_without_the_verifier_package(tmp_path: Path) -> None:
    """The verifier package is not importable in the sandbox: the runner must import without it. A None
    in sys.modules makes any import of that name fail (Python's documentation of the import system)."""
    block = "import sys; sys.modules['verifier'] = None; "
    code = block + f"sys.path.insert(0, {str(stage.RUNNER.parent)!r}); import runner; print(runner.RESULT_CAP)"
    done = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    probe = subprocess.run([sys.executable, "-c", block + "import verifier.models"], cwd=tmp_path, capture_output=True)
    assert probe.returncode != 0  # the block works: an import of verifier would have failed above


LAYERED = """\
from __future__ import annotations

import functools


def logged(function):
    @functools.wraps(function)
    def wrapper(*args):
        return function(*args)

    return wrapper


@logged
def triple(x):
    return x * 3


class Meter(dict):
    unit = "kg"

    def total(self, extra: Later = 0):
        def inner(y: Unknown) -> Missing:
            return y + 1
        return inner(super().get("a", 0) + extra)

    @property
    def reading(self):
        return [n * 2 for n in range(3) if n > 0]


if True:
    def late(a, b=2):
        return a - b if a > b else b - a
"""


def _load_runner():  # type: ignore[no-untyped-def]
    spec = importlib.util.spec_from_file_location("mutant_runner_under_test", stage.RUNNER)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_one_statement_compiled_alone_gives_the_whole_files_code(tmp_path: Path, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    """The parent compiles only the top-level statement that holds a mutant (and the file's imports); the
    reference is Python's own compile of the whole mutated file: code objects compare equal when their
    bytecode, constants, names, line table and first line are equal (CPython's code object comparison)."""
    runner = _load_runner()
    (tmp_path / "layered.py").write_text(LAYERED)
    monkeypatch.chdir(tmp_path)
    live: dict = {}
    exec(compile(LAYERED, "layered.py", "exec", dont_inherit=True), live)
    mutator = FileMutator(LAYERED, "layered.py")
    compared = set()
    for line in range(1, len(mutator.rows) + 1):
        for proposal in mutator.proposals(line):
            rendered = mutator.render(proposal)
            if rendered is None or rendered.scope is None:
                continue
            plan = {"path": "layered.py", "line": rendered.line, "end_line": rendered.end_line}
            plan |= {"original": rendered.original, "mutated": rendered.mutated, "scope": rendered.scope}
            target = live[rendered.scope.split(".")[0]]
            for part in rendered.scope.split(".")[1:]:
                target = getattr(target, part)
            function = runner._unwrap(target, rendered.scope, str(tmp_path / "layered.py"))
            source = runner.mutated_source(plan)
            alone = runner.statement_code(plan, source, "layered.py", function)
            whole = runner._code_named(compile(source, "layered.py", "exec", dont_inherit=True), rendered.scope)
            assert alone is not None and alone == whole, (rendered.scope, rendered.mutated)
            compared.add(rendered.scope)
    assert compared == {"logged", "triple", "Meter.total", "Meter.reading"}


OUTCOMES = """\
import pytest

from shop import calc


@pytest.fixture
def checked_in_setup():
    assert calc.double(2) == 4
    yield


@pytest.fixture
def checked_in_teardown():
    yield
    assert calc.double(2) == 4


def test_setup_uses_double(checked_in_setup):
    pass


def test_teardown_uses_double(checked_in_teardown):
    pass


def test_skips_when_double_is_off():
    if calc.double(2) != 4:
        pytest.skip("double is off")


@pytest.mark.xfail(strict=False)
def test_expected_to_fail_anyway():
    assert calc.double(2) == 5


@pytest.mark.xfail(strict=True)
def test_strict_expected_failure_that_passes_under_the_mutant():
    assert calc.double(2) != 4


class Unprintable(Exception):
    def __str__(self):
        raise RuntimeError("no text for this failure")


def test_fails_with_an_exception_that_cannot_be_printed():
    if calc.double(2) != 4:
        raise Unprintable()
"""


def test_each_way_of_failing_is_judged_as_pytest_judges_it(tree: Path, tmp_path: Path) -> None:
    """A child reports only the outcome (the failure is not formatted): for each way a test can end under
    the mutant (an error in setup or teardown, a skip, an expected failure, a strict expected failure that
    passes, an exception whose text cannot be made), the outcome must be pytest's own on the mutated tree
    (exit status 0 when every test passed, skipped or failed as expected: pytest's documented exit codes)."""
    (tree / "tests" / "test_outcomes.py").write_text(OUTCOMES)
    wrong_double = mutant("return x * 2", "return x / 2")
    names = [n.split("(")[0][4:] for n in OUTCOMES.split("\n") if n.startswith("def test_")]
    tests = [f"tests/test_outcomes.py::{name}" for name in names]
    records = run(tree, [(wrong_double, (test,)) for test in tests])
    mutated_tree = tmp_path / "mutated"
    shutil.copytree(tree, mutated_tree, ignore=shutil.ignore_patterns(stage.WORK_DIR))
    calc = mutated_tree / "shop" / "calc.py"
    calc.write_text(CALC.replace("return x * 2", "return x / 2"))
    expected = []
    for test in tests:
        own = subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", test], cwd=mutated_tree)
        expected.append("survived" if own.returncode == 0 else "killed")
    assert [r["status"] for r in records] == expected
    assert expected == ["killed", "killed", "survived", "survived", "killed", "killed"]  # both kinds are tried
