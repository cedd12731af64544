"""tests.weakened on real commits: every weakening pattern, and the changes that must not count."""

from __future__ import annotations

import pytest
from conftest import machine
from test_rules_support import context_for, findings, machine_change

from verifier.demo.scratch import ScratchRepo
from verifier.rules.weakened import _widened
from verifier.verdict.judge import apply_rules

BASE = """import contextlib

import pytest

from parcelkit.rates import rate, ParcelError


def test_rate_for_one_kilo():
    assert rate(1) == 4.5
    assert rate(1) > 0


def test_rejects_negative_weight():
    with pytest.raises(ValueError, match="negative"):
        rate(-1)


def test_unknown_zone():
    with pytest.raises(ParcelError):
        rate(1, zone="moon")


@pytest.mark.parametrize("weight, price", [(1, 4.5), (2, 6.0), (5, 9.0)])
def test_table(weight, price):
    assert rate(weight) == price


class TestZones:
    def test_home_zone(self):
        assert rate(1, zone="home") == 4.5
"""


def weaken(old: str, new: str) -> str:
    assert old in BASE, old
    return BASE.replace(old, new)


def run(repo: ScratchRepo, head: str, human: bool = False) -> list[tuple[int | None, str]]:
    context = machine_change(repo, {"tests/test_rates.py": BASE}, {"tests/test_rates.py": head}, human=human)
    return [(f.line, f.message) for f in findings("tests.weakened", context)]


CASES = {
    "assertion removed": (weaken("    assert rate(1) > 0\n", ""), "1 of 2 assertions removed"),
    "skip marker added": (
        weaken("def test_table", "@pytest.mark.skip(reason='flaky')\ndef test_table"),
        "pytest.mark.skip added to test_table",
    ),
    "xfail marker added": (
        weaken("def test_unknown_zone", "@pytest.mark.xfail\ndef test_unknown_zone"),
        "pytest.mark.xfail added to test_unknown_zone",
    ),
    "skip call added": (
        weaken("    assert rate(1) == 4.5\n", "    pytest.skip('later')\n    assert rate(1) == 4.5\n"),
        "skip added to test_rate_for_one_kilo",
    ),
    "module pytestmark": (
        weaken("from parcelkit", "pytestmark = pytest.mark.skip\nfrom parcelkit"),
        "pytest.mark.skip added to the module",
    ),
    "class marker": (
        weaken("class TestZones:", "@pytest.mark.skip\nclass TestZones:"),
        "pytest.mark.skip added to class TestZones",
    ),
    "assert True": (weaken("    assert rate(1) > 0\n", "    assert True\n"), "line 10 can no longer fail (asserts a"),
    "assert x == x": (
        weaken("    assert rate(1) > 0\n", "    assert rate(1) == rate(1)\n"),
        "line 10 can no longer fail (compares a value with itself)",
    ),
    "assert a string": (weaken("    assert rate(1) > 0\n", "    assert 'checked'\n"), "can no longer fail (asserts a"),
    "raises widened": (
        weaken('pytest.raises(ValueError, match="negative")', 'pytest.raises(Exception, match="negative")'),
        "pytest.raises widened to Exception",
    ),
    "raises of a project error widened": (
        weaken("pytest.raises(ParcelError)", "pytest.raises(BaseException)"),
        "pytest.raises widened to BaseException",
    ),
    "raises match dropped": (
        weaken('pytest.raises(ValueError, match="negative")', "pytest.raises(ValueError)"),
        "no longer checks the message",
    ),
    "parametrize cut": (weaken("[(1, 4.5), (2, 6.0), (5, 9.0)]", "[(1, 4.5)]"), "parametrize cases cut from 3 to 1"),
    "test function deleted": (
        weaken(
            """def test_unknown_zone():
    with pytest.raises(ParcelError):
        rate(1, zone="moon")


""",
            "",
        ),
        "test function test_unknown_zone deleted",
    ),
    "expected literal changed": (
        weaken("assert rate(1) == 4.5\n    assert", "assert rate(1) == 5.0\n    assert"),
        "expected value changed (4.5 -> 5.0)",
    ),
    # issue 16: existing assertions made dead, comparisons flipped, skips and collection tricks
    "assertion wrapped in try/except": (
        weaken(
            "    assert rate(1) > 0\n",
            "    try:\n        assert rate(1) > 0\n    except AssertionError:\n        pass\n",
        ),
        "line 11 can no longer fail (inside the try whose 'except' on line 12 ignores a failed assert)",
    ),
    "assertion or True": (
        weaken("    assert rate(1) > 0\n", "    assert rate(1) > 0 or True\n"),
        "line 10 can no longer fail (is joined by 'or' to something always true)",
    ),
    "assertion moved after a return": (
        weaken("    assert rate(1) > 0\n", "    return\n    assert rate(1) > 0\n"),
        "line 11 can no longer fail (after the return on line 10)",
    ),
    "assertion moved into an uncalled nested function": (
        weaken("    assert rate(1) > 0\n", "    def later():\n        assert rate(1) > 0\n"),
        "(in the nested function later (line 10), which is never called)",
    ),
    "assertion under if False": (
        weaken("    assert rate(1) > 0\n", "    if False:\n        assert rate(1) > 0\n"),
        "line 11 can no longer fail (under 'if False:' (line 10))",
    ),
    "assertion under contextlib.suppress": (
        weaken(
            "    assert rate(1) > 0\n", "    with contextlib.suppress(AssertionError):\n        assert rate(1) > 0\n"
        ),
        "(under contextlib.suppress on line 10)",
    ),
    "== 5 becomes != 6": (
        weaken("    assert rate(1) == 4.5\n", "    assert rate(1) != 6.0\n"),
        "the assertion's comparison changed (== -> !=)",
    ),
    "skip raised from the body": (
        weaken("    assert rate(1) == 4.5\n", "    raise pytest.skip.Exception('later')\n    assert rate(1) == 4.5\n"),
        "skip added to test_rate_for_one_kilo",
    ),
    "unittest SkipTest raised": (
        weaken("import pytest\n", "import pytest\nimport unittest\n").replace(
            "        rate(-1)\n", "        raise unittest.SkipTest('no')\n        rate(-1)\n"
        ),
        "skip added to test_rejects_negative_weight",
    ),
    "module-level skip": (
        weaken("from parcelkit", "pytest.skip('maintenance', allow_module_level=True)\nfrom parcelkit"),
        "module-level skip added",
    ),
    "module-level importorskip": (
        weaken("from parcelkit", "pytest.importorskip('parcelkit_missing')\nfrom parcelkit"),
        "module-level skip added",
    ),
    "autouse fixture that skips": (
        BASE + "\n\n@pytest.fixture(autouse=True)\ndef _maintenance():\n    pytest.skip('maintenance')\n",
        "autouse fixture _maintenance skips",
    ),
    "no-op decorator": (
        weaken(
            "@pytest.mark.parametrize",
            "def quiet(test):\n    return lambda *a: None\n\n\n@quiet\n@pytest.mark.parametrize",
        ),
        "decorator @quiet added to test_table never runs the test",
    ),
    "test class renamed": (
        weaken("class TestZones:", "class Zones:"),
        "test TestZones.test_home_zone moved to Zones.test_home_zone, which is not collected: class Zones does not",
    ),
    "test class given __test__ = False": (
        weaken("class TestZones:\n", "class TestZones:\n    __test__ = False\n\n"),
        "test TestZones.test_home_zone is no longer collected: class TestZones sets __test__ = False",
    ),
    "test class given an __init__": (
        weaken("class TestZones:\n", "class TestZones:\n    def __init__(self):\n        self.zone = 'home'\n\n"),
        "no longer collected: class TestZones has an __init__",
    ),
    "test function given __test__ = False": (
        BASE + "\n\ntest_table.__test__ = False\n",
        "test test_table is no longer collected: test_table.__test__ is set to False",
    ),
}


@pytest.mark.parametrize("name", list(CASES))
def test_weakening_is_found(repo: ScratchRepo, name: str) -> None:
    head, message = CASES[name]
    found = run(repo, head)
    assert any(message in text for _, text in found), found
    assert len(found) == 1, found


@pytest.mark.parametrize("name", ["assertion removed", "skip marker added", "test function deleted", "assert True"])
def test_the_same_weakening_by_a_human_is_not_this_rule(repo: ScratchRepo, name: str) -> None:
    assert run(repo, CASES[name][0], human=True) == []


def test_silent_on_changes_that_do_not_weaken(repo: ScratchRepo) -> None:
    head = weaken("    assert rate(1) > 0\n", "    assert rate(1) > 0\n    assert rate(2) > rate(1)\n")
    head = head.replace("pytest.raises(ParcelError)", 'pytest.raises(ParcelError, match="zone")')  # narrower
    head += "\n\ndef test_new_case():\n    assert rate(3) == 7.5\n"
    head = head.replace("def test_home_zone(self):", "def test_home_zone_price(self):")  # a rename, same body
    assert run(repo, head) == []


def test_deleted_test_file(repo: ScratchRepo) -> None:
    repo.commit("Base", {"tests/test_rates.py": BASE, "parcelkit/__init__.py": ""})
    from conftest import machine
    from test_rules_support import context_for

    sha = repo.commit(machine("Drop the rate tests"), remove=("tests/test_rates.py",))
    found = findings("tests.weakened", context_for(repo, sha))
    assert [f.message for f in found] == ["test file deleted (5 test functions)"]


def test_changed_expectation_only_warns_even_when_the_rule_blocks(repo: ScratchRepo) -> None:
    context = machine_change(
        repo, {"tests/test_rates.py": BASE}, {"tests/test_rates.py": CASES["expected literal changed"][0]}
    )
    judged = [f for f in apply_rules("static", context) if f.rule == "tests.weakened"]
    assert [f.severity for f in judged] == ["warn"]


def test_widened_follows_the_builtin_exception_hierarchy() -> None:
    # The hierarchy is Python's own (builtins); Python docs, "Exception hierarchy": LookupError is the
    # base of KeyError and IndexError, OSError of FileNotFoundError.
    assert _widened([KeyError], [LookupError]) == "LookupError"
    assert _widened([FileNotFoundError], [OSError]) == "OSError"
    assert _widened([LookupError], [KeyError]) is None  # narrower
    assert _widened([ValueError], [TypeError]) is None  # different, not broader
    assert _widened([ValueError, TypeError], [Exception]) == "Exception"
    assert _widened([None], [ValueError]) is None  # a project error replaced by a builtin: unknown, not flagged


UNITTEST_BASE = """import unittest

from parcelkit.rates import rate


class RateCase(unittest.TestCase):
    def test_zones_differ(self):
        self.assertNotEqual(rate(1, zone="home"), rate(1, zone="abroad"))
"""


def test_assert_not_equal_flipped_to_assert_equal(repo: ScratchRepo) -> None:
    head = UNITTEST_BASE.replace("assertNotEqual", "assertEqual")
    context = machine_change(repo, {"tests/test_zones.py": UNITTEST_BASE}, {"tests/test_zones.py": head})
    found = [(f.line, f.message) for f in findings("tests.weakened", context)]
    message = "RateCase.test_zones_differ: the assertion's comparison changed (assertNotEqual -> assertEqual)"
    assert found == [(8, message)]


def test_unittest_class_renamed_stays_collected(repo: ScratchRepo) -> None:
    # pytest collects unittest.TestCase subclasses whatever their name (pytest documentation, "unittest.TestCase
    # Support"), so this rename loses nothing.
    head = UNITTEST_BASE.replace("class RateCase", "class ZoneRates")
    context = machine_change(repo, {"tests/test_zones.py": UNITTEST_BASE}, {"tests/test_zones.py": head})
    assert findings("tests.weakened", context) == []


def test_test_file_renamed_outside_the_collection_pattern(repo: ScratchRepo) -> None:
    repo.commit("Base", {"tests/test_rates.py": BASE, "parcelkit/__init__.py": ""})
    repo.git("mv", "tests/test_rates.py", "tests/rates_checks.py")
    sha = repo.commit(machine("Tidy the test names"))
    found = findings("tests.weakened", context_for(repo, sha))
    assert [f.message.split(":")[0] for f in found] == [
        "test file renamed from tests/test_rates.py to a name pytest does not collect"
    ]


def test_test_file_renamed_inside_the_collection_pattern_is_fine(repo: ScratchRepo) -> None:
    repo.commit("Base", {"tests/test_rates.py": BASE, "parcelkit/__init__.py": ""})
    repo.git("mv", "tests/test_rates.py", "tests/test_parcel_rates.py")
    sha = repo.commit(machine("Tidy the test names"))
    assert findings("tests.weakened", context_for(repo, sha)) == []


HONEST_REFACTORS = {
    "assertions moved into a helper": weaken(
        "def test_rate_for_one_kilo():\n    assert rate(1) == 4.5\n    assert rate(1) > 0\n",
        "def check_price(weight, price):\n    assert rate(weight) == price\n\n\n"
        "def test_rate_for_one_kilo():\n    check_price(1, 4.5)\n    assert rate(1) > 0\n",
    ),
    "assertions in a loop": weaken(
        "    assert rate(1) == 4.5\n    assert rate(1) > 0\n",
        "    for weight in (1,):\n        assert rate(weight) == 4.5\n        assert rate(weight) > 0\n",
    ),
    "a called nested check": weaken(
        "    assert rate(1) > 0\n",
        "    def positive(weight):\n        assert rate(weight) > 0\n\n    positive(1)\n",
    ),
    "an error turned into a failure": weaken(
        "    assert rate(1) == 4.5\n",
        "    try:\n        price = rate(1)\n    except ParcelError as error:\n        pytest.fail(str(error))\n"
        "    assert price == 4.5\n",
    ),
    "an early return on a condition": weaken(
        "    assert rate(1) == 4.5\n", "    if rate is None:\n        return\n    assert rate(1) == 4.5\n"
    ),
    "a mark that is not a skip": weaken("def test_table", "@pytest.mark.slow\ndef test_table"),
    "a wrapping decorator": weaken(
        "@pytest.mark.parametrize",
        "def logged(test):\n    def run(*args, **kwargs):\n        return test(*args, **kwargs)\n\n    return run\n\n\n"
        "@logged\n@pytest.mark.parametrize",
    ),
    "a fixture that is not autouse and skips": BASE
    + "\n\n@pytest.fixture\ndef online():\n    pytest.skip('needs the network')\n",
    "a new module-level constant": weaken("from parcelkit", "HOME = 'home'\nfrom parcelkit"),
}


@pytest.mark.parametrize("name", list(HONEST_REFACTORS))
def test_honest_refactor_of_a_test_is_not_weakening(repo: ScratchRepo, name: str) -> None:
    assert run(repo, HONEST_REFACTORS[name]) == []


VARIABLE_BASE = (
    "from parcelkit.rates import rate\n\n\ndef test_rate():\n    expected = 4.5\n    assert rate(1) == expected\n"
)


def test_expected_value_held_in_a_variable_changed_warns(repo: ScratchRepo) -> None:
    head = VARIABLE_BASE.replace("4.5", "5.0")
    context = machine_change(repo, {"tests/test_rates.py": VARIABLE_BASE}, {"tests/test_rates.py": head})
    found = [(f.line, f.severity, f.message) for f in findings("tests.weakened", context)]
    assert found == [(5, "warn", "test_rate: expected value changed (expected: 4.5 -> 5.0)")]


def test_a_changed_variable_no_check_reads_is_not_an_expectation(repo: ScratchRepo) -> None:
    base = VARIABLE_BASE.replace("    expected = 4.5\n", "    expected = 4.5\n    label = 'one kilo'\n")
    head = base.replace("'one kilo'", "'1 kg'")
    context = machine_change(repo, {"tests/test_rates.py": base}, {"tests/test_rates.py": head})
    assert findings("tests.weakened", context) == []
