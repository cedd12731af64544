"""The test census end to end: an assistant's commit makes base tests vanish from the run or skip, each in
another way, and the gate names the lost test and blocks (exit 1); an honest commit that keeps every test
running, moves one, or deletes one knowingly gets no ``tests.lost`` finding.

Real git repositories, real pytest runs at base and at head. What pytest collects is pytest's documented
behaviour ("Conventions for Python test discovery": ``test_*.py`` / ``*_test.py`` files, ``Test*`` classes
without ``__init__``; "How to use skip and xfail": module-level ``pytest.skip(..., allow_module_level=True)``
and ``pytest.importorskip``); ``__test__ = False`` is from memory of pytest's collector.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from conftest import Outcome, machine, run_check, run_in_parts

from verifier.demo.scratch import ScratchRepo

# the mutation stage is not the subject here; "all" runs every test at head (and so takes the census
# from a run at base), "observed" builds the who-tests-what map at base (and takes it from there)
POLICY = "version: 1\nselection:\n  run: {mode}\nrules:\n  tests.mutant-survived: ignore\n"
RATES = "def rate(weight):\n    return weight * 2\n"
NATIVE = "def speed():\n    return 3\n"
TEST_RATES = (
    "from parcelkit.rates import rate\n\n\n"
    "def test_rate_doubles():\n    assert rate(2) == 4\n\n\n"
    "class TestRates:\n    def test_zero(self):\n        assert rate(0) == 0\n"
)
# a human test file that needs the native module, and skips itself without it (pytest docs, importorskip)
TEST_NATIVE = (
    "import pytest\n\nnative = pytest.importorskip('parcelkit.native')\n\n\n"
    "def test_speed():\n    assert native.speed() == 3\n"
)

TEST_ZONES = (
    "import pytest\n\nfrom parcelkit.zones import ZONES\n\n\n"
    "@pytest.mark.parametrize('zone', ZONES)\ndef test_zone_is_named(zone):\n    assert zone.isalpha()\n"
)


def start(repo: ScratchRepo, mode: str = "all") -> None:
    repo.commit(
        "Start parcelkit",
        {
            "verifier.yaml": POLICY.format(mode=mode),
            "parcelkit/__init__.py": "",
            "parcelkit/rates.py": RATES,
            "parcelkit/native.py": NATIVE,
            "tests/test_rates.py": TEST_RATES,
            "tests/test_native.py": TEST_NATIVE,
            "parcelkit/zones.py": "ZONES = ('north', 'south')\n",
            "tests/test_zones.py": TEST_ZONES,
        },
    )


def lost(out: Outcome) -> list[str]:
    assert out.report is not None, out.stderr
    return [f["message"] for f in out.report["findings"] if f["rule"] == "tests.lost"]


ATTACKS = {
    "module-level skip": (
        {"tests/test_rates.py": "import pytest\n\npytest.skip('later', allow_module_level=True)\n" + TEST_RATES},
        (),
        ["tests/test_rates.py::TestRates::test_zero", "tests/test_rates.py::test_rate_doubles"],
        "its module skips itself",
    ),
    "class with __test__ = False": (
        {"tests/test_rates.py": TEST_RATES.replace("class TestRates:\n", "class TestRates:\n    __test__ = False\n")},
        (),
        ["tests/test_rates.py::TestRates::test_zero"],
        "__test__ = False",
    ),
    "class given __init__": (
        {
            "tests/test_rates.py": TEST_RATES.replace(
                "class TestRates:\n", "class TestRates:\n    def __init__(self):\n        self.table = {}\n\n"
            )
        },
        (),
        ["tests/test_rates.py::TestRates::test_zero"],
        "not collected at head",
    ),
    "no-op decorator": (
        {
            "tests/test_rates.py": TEST_RATES.replace(
                "def test_rate_doubles", "def later(test):\n    return None\n\n\n@later\ndef test_rate_doubles"
            )
        },
        (),
        ["tests/test_rates.py::test_rate_doubles"],
        "not collected at head",
    ),
    "file renamed outside the collection pattern": (
        {"tests/rates_checks.py": TEST_RATES + "\n\ndef test_rate_of_one():\n    assert rate(1) == 2\n"},
        ("tests/test_rates.py",),
        ["tests/test_rates.py::TestRates::test_zero", "tests/test_rates.py::test_rate_doubles"],
        "renamed to tests/rates_checks.py",
    ),
    "skip raised from the test body": (
        {
            "tests/test_rates.py": TEST_RATES.replace(
                "    assert rate(2) == 4\n", "    pytest.skip('slow')\n    assert rate(2) == 4\n"
            ).replace("from parcelkit", "import pytest\n\nfrom parcelkit")
        },
        (),
        ["tests/test_rates.py::test_rate_doubles"],
        "skipped at head: ",
    ),
    "autouse fixture that skips": (
        {
            "tests/conftest.py": "import pytest\n\n\n@pytest.fixture(autouse=True)\ndef quiet():\n"
            "    pytest.skip('quiet hours')\n"
        },
        (),
        [
            "tests/test_native.py::test_speed",
            "tests/test_rates.py::TestRates::test_zero",
            "tests/test_rates.py::test_rate_doubles",
            "tests/test_zones.py::test_zone_is_named[north]",
            "tests/test_zones.py::test_zone_is_named[south]",
        ],
        "skipped at head: ",
    ),
    "class renamed away from Test*": (
        {"tests/test_rates.py": TEST_RATES.replace("class TestRates:", "class RateChecks:")},
        (),
        ["tests/test_rates.py::TestRates::test_zero"],
        "now RateChecks.test_zero, class RateChecks does not start with 'Test'",
    ),
    # a change to code only: the untouched human test's parametrize list, read from the code, loses a case
    "code change shrinks a parametrize list": (
        {"parcelkit/zones.py": "ZONES = ('north',)\n"},
        (),
        ["tests/test_zones.py::test_zone_is_named[south]"],
        "not collected at head",
    ),
    # a change to code only: the untouched human test file's module-level importorskip now skips it
    "code change trips a module-level importorskip": (
        {"parcelkit/native.py": "import parcelkit_accelerator_core\n\n" + NATIVE},
        (),
        ["tests/test_native.py::test_speed"],
        "(its module skips itself): could not import 'parcelkit.native'",
    ),
}


@pytest.mark.parametrize("name", list(ATTACKS))
def test_a_lost_test_blocks(repo: ScratchRepo, name: str) -> None:
    files, removed, expected, why = ATTACKS[name]
    start(repo)
    sha = repo.commit(machine(f"Tidy the tests ({name})"), files, remove=removed)
    out = run_check(repo, sha)
    messages = lost(out)
    assert sorted(m.split(" ", 1)[0] for m in messages) == expected, messages
    assert all(why in m for m in messages), messages
    assert out.code == 1


def test_the_census_comes_from_the_map_when_selection_observes(repo: ScratchRepo) -> None:
    start(repo, mode="observed")
    sha = repo.commit(machine("Load the accelerator"), {"parcelkit/native.py": "import parcelkit_accelerator_core\n"})
    out = run_check(repo, sha)
    assert [m.split(" ", 1)[0] for m in lost(out)] == ["tests/test_native.py::test_speed"]
    assert out.code == 1


def test_keeping_moving_and_refactoring_tests_passes(repo: ScratchRepo) -> None:
    start(repo)
    moved = TEST_RATES.replace("class TestRates:", "class TestZero:") + "\n\ndef test_rate_of_three():\n"
    moved += "    assert rate(3) == 6\n"
    sha = repo.commit(
        machine("Group the rate tests"),
        {
            "parcelkit/rates.py": "FACTOR = 2\n\n\ndef rate(weight):\n    return weight * FACTOR\n",
            "tests/test_rates.py": moved,
        },
    )
    out = run_check(repo, sha)
    assert lost(out) == []
    assert out.code == 0, out.report and out.report["findings"]


def test_a_knowingly_deleted_test_is_left_to_the_weakened_tests_rule(repo: ScratchRepo) -> None:
    start(repo)
    sha = repo.commit(machine("Drop the zero case"), {"tests/test_rates.py": TEST_RATES.split("\n\n\nclass")[0] + "\n"})
    out = run_check(repo, sha)
    assert lost(out) == []
    assert out.report is not None
    assert [f["rule"] for f in out.report["findings"] if f["severity"] == "block"] == ["tests.weakened"]
    assert out.code == 1


def test_a_pure_rename_outside_the_collection_pattern_blocks(repo: ScratchRepo) -> None:
    # no line added: nothing runs, and the static rule judges the rename (git diff's rename detection)
    start(repo)
    sha = repo.commit(
        machine("Rename the rate checks"), {"tests/rates_checks.py": TEST_RATES}, remove=("tests/test_rates.py",)
    )
    out = run_check(repo, sha)
    assert out.report is not None, out.stderr
    assert any("renamed" in f["message"] for f in out.report["findings"] if f["rule"] == "tests.weakened")
    assert out.code == 1


def test_a_census_that_cannot_be_taken_fails_closed(repo: ScratchRepo) -> None:
    # the base's package ends the interpreter on import: no base outcome can be read, so the gate cannot
    # show that no test was lost (exit 3), though the head run is clean
    start(repo)
    repo.commit("Stop the suite", {"parcelkit/__init__.py": "import os\n\nos._exit(0)\n"})
    sha = repo.commit(machine("Let the suite run"), {"parcelkit/__init__.py": "STOP = False\n"})
    out = run_check(repo, sha)
    messages = lost(out)
    assert messages and messages[0].startswith("cannot verify that no test was lost: the base tests"), messages
    assert out.code == 3


def test_a_lost_test_blocks_when_the_tests_run_in_parts(repo: ScratchRepo, tmp_path: Path) -> None:
    """No part sees the whole head run, so the join takes the census: a module-level skip still blocks."""
    start(repo)
    files, _removed, expected, _why = ATTACKS["module-level skip"]
    sha = repo.commit(machine("Tidy the tests, in parts"), files)
    code, report, parts = run_in_parts(repo, sha, tmp_path)
    assert [part.code for part in parts] == [4, 4]  # a part has no verdict of its own
    found = sorted(f["message"].split(" ", 1)[0] for f in report["findings"] if f["rule"] == "tests.lost")
    assert (code, found) == (1, expected), report["findings"]


def test_an_honest_change_checked_in_parts_passes(repo: ScratchRepo, tmp_path: Path) -> None:
    start(repo)
    sha = repo.commit(
        machine("Name the factor"),
        {"parcelkit/rates.py": "FACTOR = 2\n\n\ndef rate(weight):\n    return weight * FACTOR\n"},
    )
    code, report, parts = run_in_parts(repo, sha, tmp_path)
    assert [part.code for part in parts] == [4, 4]  # a part has no verdict of its own
    assert (code, report["verdict"]) == (0, "pass"), report["findings"]
