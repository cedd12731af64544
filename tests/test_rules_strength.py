"""The test-strength rules on real machine-written commits: tests that cannot fail, and honest tests that can.

What counts as able to fail a test is pytest's documented behaviour (pytest documentation, "How to write and
report assertions in tests": a test fails when it raises, a failed ``assert`` included); the end-to-end test
at the bottom runs the very tests through real pytest to show each weak one passes on a wrong result.
"""

from __future__ import annotations

import subprocess
import sys

import pytest
from conftest import machine, run_check
from test_rules_support import findings, machine_change

from verifier.demo.scratch import ScratchRepo

CODE = {"parcelkit/__init__.py": "", "parcelkit/rates.py": "def rate(weight):\n    return 4.5 * weight\n"}
HEAD = "import contextlib\n\nimport pytest\n\nfrom parcelkit.rates import rate\n\n\n"

# name -> (a machine-written test function, the (rule, line) findings it must give). Line 8 is the def.
WEAK = {
    "no assertion": ("def test_rate():\n    rate(2)\n", [("tests.cannot-fail", 8)]),
    "only assert True": ("def test_rate():\n    rate(2)\n    assert True\n", [("tests.cannot-fail", 8)]),
    "value compared with itself": (
        "def test_rate():\n    assert rate(2) == rate(2)\n",
        [("tests.cannot-fail", 8)],
    ),
    "x or True": ("def test_rate():\n    assert rate(2) == 9.0 or True\n", [("tests.cannot-fail", 8)]),
    "assert of a tuple": ("def test_rate():\n    assert (rate(2) == 9.0, 'price')\n", [("tests.cannot-fail", 8)]),
    "constants compared": ("def test_rate():\n    rate(2)\n    assert 9.0 == 9.0\n", [("tests.cannot-fail", 8)]),
    "assertion after a return": (
        "def test_rate():\n    value = rate(2)\n    return\n    assert value == 9.0\n",
        [("tests.cannot-fail", 8)],
    ),
    "assertion in a never-called nested function": (
        "def test_rate():\n    value = rate(2)\n\n    def check():\n        assert value == 9.0\n",
        [("tests.cannot-fail", 8)],
    ),
    "assertion under if False": (
        "def test_rate():\n    value = rate(2)\n    if False:\n        assert value == 9.0\n",
        [("tests.cannot-fail", 8)],
    ),
    "assertion in a try that ignores it": (
        "def test_rate():\n    try:\n        assert rate(2) == 9.0\n    except Exception:\n        pass\n",
        [("tests.cannot-fail", 8)],
    ),
    "one dead check beside a live one": (
        "def test_rate():\n    assert rate(1) == 4.5\n    return\n    assert rate(2) == 9.0\n",
        [("tests.dead-check", 11)],
    ),
    "a trivial check beside a live one": (
        "def test_rate():\n    assert rate(1) == 4.5\n    assert rate(2) is rate(2)\n",
        [("tests.dead-check", 10)],
    ),
    "every exception of the call swallowed": (
        "def test_rate():\n    try:\n        value = rate('two')\n    except Exception:\n        value = None\n"
        "        return\n    assert value == 9.0\n",
        [("tests.swallowed-errors", 9)],
    ),
    "bare except around the call": (
        "def test_rate():\n    try:\n        value = rate('two')\n    except:\n        return\n"
        "    assert value == 9.0\n",
        [("tests.swallowed-errors", 9)],
    ),
    "a call of an ordinary helper only": (
        "from parcelkit.reports import print_rates\n\n\ndef test_rate():\n    print_rates(rate(2))\n",
        [("tests.cannot-fail", 11)],  # the def is on line 11 here (the import comes first)
    ),
    "uncollected test class": (
        "class RateChecks:\n    def test_rate(self):\n        assert rate(2) == 9.0\n",
        [("tests.cannot-fail", 9)],
    ),
}

HONEST = {
    "plain assertion": "def test_rate():\n    assert rate(2) == 9.0\n",
    "raises context": "def test_rate():\n    with pytest.raises(TypeError):\n        rate(None)\n",
    "mock assertion": (
        "from unittest import mock\n\n\ndef test_rate():\n    spy = mock.Mock(wraps=rate)\n    spy(2)\n"
        "    spy.assert_called_once_with(2)\n"
    ),
    "assertion helper of the file": (
        "def check_price(weight, price):\n    assert rate(weight) == price\n\n\n"
        "def test_rate():\n    check_price(2, 9.0)\n"
    ),
    "a nested check that is called": (
        "def test_rate():\n    def check(weight):\n        assert rate(weight) == 4.5 * weight\n\n"
        "    for weight in (1, 2):\n        check(weight)\n"
    ),
    "an error turned into a failure": (
        "def test_rate():\n    try:\n        value = rate(2)\n    except Exception as error:\n"
        "        pytest.fail(f'rate raised {error}')\n    assert value == 9.0\n"
    ),
    "a narrow except that expects an error": (
        "def test_rate():\n    try:\n        rate(None)\n    except TypeError:\n        return\n"
        "    raise AssertionError('no TypeError')\n"
    ),
    "cleanup in finally": (
        "def test_rate():\n    try:\n        assert rate(2) == 9.0\n    finally:\n        print('done')\n"
    ),
    "an explicit raise on a wrong result": (
        "def test_rate():\n    if rate(2) != 9.0:\n        raise AssertionError('wrong rate')\n"
    ),
    "unittest assertion": (
        "import unittest\n\n\nclass RateCase(unittest.TestCase):\n    def test_rate(self):\n"
        "        self.assertEqual(rate(2), 9.0)\n"
    ),
    "an error recorded as a flag a check reads": (
        "def test_rate():\n    failed = False\n    try:\n        rate(2)\n    except Exception:\n"
        "        failed = True\n    assert not failed\n"
    ),
    "a checking helper from a shared test module": (
        "from tests.helpers import price_matches\n\n\ndef test_rate():\n    price_matches(rate, 2, 9.0)\n"
    ),
    "a helper named for checking": (
        "from parcelkit.testing_tools import check_price\n\n\ndef test_rate():\n    check_price(2)\n"
    ),
    "a fixture whose name starts with test": (
        "@pytest.fixture\ndef test_weights():\n    return [1, 2]\n\n\n"
        "def test_rate(test_weights):\n    assert [rate(w) for w in test_weights] == [4.5, 9.0]\n"
    ),
    "approx comparison": "def test_rate():\n    assert rate(2) == pytest.approx(9.0)\n",
    "conditional early return": (
        "def test_rate():\n    if sys_platform() == 'win32':\n        return\n    assert rate(2) == 9.0\n\n\n"
        "def sys_platform():\n    return 'linux'\n"
    ),
}

RULES = ("tests.cannot-fail", "tests.dead-check", "tests.swallowed-errors")


def strength_findings(repo: ScratchRepo, test_source: str, human: bool = False) -> list[tuple[str, int | None]]:
    context = machine_change(repo, CODE, {"tests/test_rates.py": HEAD + test_source}, human=human)
    return sorted((f.rule, f.line) for rule in RULES for f in findings(rule, context))


@pytest.mark.parametrize("name", list(WEAK))
def test_weak_test_is_found(repo: ScratchRepo, name: str) -> None:
    source, expected = WEAK[name]
    assert strength_findings(repo, source) == expected


@pytest.mark.parametrize("name", list(HONEST))
def test_honest_test_is_not_reported(repo: ScratchRepo, name: str) -> None:
    assert strength_findings(repo, HONEST[name]) == []


def test_a_human_test_is_not_judged(repo: ScratchRepo) -> None:
    assert strength_findings(repo, WEAK["no assertion"][0], human=True) == []


def test_finding_names_the_test_and_the_reason(repo: ScratchRepo) -> None:
    source = WEAK["assertion after a return"][0]
    context = machine_change(repo, CODE, {"tests/test_rates.py": HEAD + source})
    [found] = findings("tests.cannot-fail", context)
    assert found.path == "tests/test_rates.py" and found.details["test"] == "test_rate"
    assert found.message == "test_rate: none of its checks can fail: line 11 after the return on line 10"


def test_dead_check_in_an_existing_test_by_the_model(repo: ScratchRepo) -> None:
    base = HEAD + "def test_rate():\n    assert rate(1) == 4.5\n"
    head = HEAD + "def test_rate():\n    assert rate(1) == 4.5\n    if 0:\n        assert rate(2) == 9.0\n"
    context = machine_change(repo, {**CODE, "tests/test_rates.py": base}, {"tests/test_rates.py": head})
    found = [(f.rule, f.line, f.message) for rule in RULES for f in findings(rule, context)]
    assert found == [
        ("tests.dead-check", 11, "test_rate: the check on line 11 can never fail the test: under 'if 0:' (line 10)")
    ]


@pytest.mark.parametrize(
    "name",
    [
        "no assertion",
        "x or True",
        "assertion after a return",
        "assertion in a try that ignores it",
        "bare except around the call",
    ],
)
def test_weak_tests_really_pass_on_a_wrong_result(tmp_path, name: str) -> None:
    """Checked against pytest itself: with ``rate`` made wrong (it returns -1 or raises), each weak test still
    passes (exit status 0, pytest's documented "all tests passed"), and a plain assertion fails (exit 1)."""
    (tmp_path / "parcelkit").mkdir()
    (tmp_path / "parcelkit" / "__init__.py").write_text("")
    wrong = "def rate(weight):\n    if isinstance(weight, str):\n        raise ValueError(weight)\n    return -1\n"
    (tmp_path / "parcelkit" / "rates.py").write_text(wrong)
    (tmp_path / "test_weak.py").write_text(HEAD + WEAK[name][0])
    (tmp_path / "test_strong.py").write_text(HEAD + HONEST["plain assertion"])
    command = [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider"]
    weak = subprocess.run([*command, "test_weak.py"], cwd=tmp_path, capture_output=True, text=True)
    strong = subprocess.run([*command, "test_strong.py"], cwd=tmp_path, capture_output=True, text=True)
    assert weak.returncode == 0, weak.stdout
    assert strong.returncode == 1, strong.stdout


def test_gate_blocks_a_wrong_function_with_an_assertion_free_test(repo: ScratchRepo) -> None:
    """End to end (issue 10): a wrong function and a machine-written test that calls it on every branch and
    asserts nothing: full coverage, the test passes, and the gate blocks on the test's strength."""
    repo.commit("Start parcelkit", {"parcelkit/__init__.py": "", "README.md": "parcelkit\n"})
    code = "def band(weight):\n    if weight > 10:\n        return 'light'\n    return 'heavy'\n"  # swapped
    test = "from parcelkit.bands import band\n\n\ndef test_band():\n    band(1)\n    band(20)\n"
    sha = repo.commit(machine("Add weight bands"), {"parcelkit/bands.py": code, "tests/test_bands.py": test})
    out = run_check(repo, sha)
    assert out.report is not None, out.stderr
    rules = {f["rule"] for f in out.report["findings"] if f["severity"] == "block"}
    assert "tests.cannot-fail" in rules and out.code == 1

    honest = "from parcelkit.bands import band\n\n\ndef test_band():\n    assert band(1) == 'light'\n"
    right = code.replace("'light'\n    return 'heavy'", "'heavy'\n    return 'light'")
    sha = repo.commit(
        machine("Fix the bands"),
        {"parcelkit/bands.py": right, "tests/test_bands.py": honest + "    assert band(20) == 'heavy'\n"},
    )
    out = run_check(repo, sha)
    assert out.report is not None, out.stderr
    assert not [f for f in out.report["findings"] if f["rule"].startswith("tests.")], out.report["findings"]
