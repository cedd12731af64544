"""tests.weakened on real commits: every weakening pattern, and the changes that must not count."""

from __future__ import annotations

import pytest
from test_rules_support import findings, machine_change

from verifier.demo.scratch import ScratchRepo
from verifier.rules.weakened import _widened
from verifier.verdict.judge import apply_rules

BASE = """import pytest

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
        "skip call added to test_rate_for_one_kilo",
    ),
    "module pytestmark": (
        weaken("from parcelkit", "pytestmark = pytest.mark.skip\nfrom parcelkit"),
        "pytest.mark.skip added to the module",
    ),
    "class marker": (
        weaken("class TestZones:", "@pytest.mark.skip\nclass TestZones:"),
        "pytest.mark.skip added to class TestZones",
    ),
    "assert True": (weaken("    assert rate(1) > 0\n", "    assert True\n"), "assertion that cannot fail"),
    "assert x == x": (
        weaken("    assert rate(1) > 0\n", "    assert rate(1) == rate(1)\n"),
        "assertion that cannot fail",
    ),
    "assert a string": (weaken("    assert rate(1) > 0\n", "    assert 'checked'\n"), "assertion that cannot fail"),
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
