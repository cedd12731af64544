"""Old tests judge new code, end to end: an assistant's commit changes the behaviour and rewrites the test's
expectation to match (in several syntaxes); the test's base version, run against the head code in the
sandbox, fails, and ``tests.rewritten`` names the test and the statement that changed (exit 1). An honest
refactor of a test keeps its base version passing (exit 0), and a human can approve a behaviour change with
a waiver written in the trusted policy (exit 0, the finding kept as info). Real git, real pytest runs.
"""

from __future__ import annotations

import pytest
from conftest import Outcome, machine, run_check

from verifier.demo.scratch import ScratchRepo

POLICY = "version: 1\nselection:\n  run: {mode}\nrules:\n  tests.mutant-survived: ignore\n"
# the waiver format of docs/policy.md; the far expiry keeps the test independent of today's date
WAIVER = (
    "waivers:\n  - rule: tests.rewritten\n    path: tests/test_rates.py\n"
    "    reason: the 2027 tariff doubles the surcharge (PK-77)\n    owner: ada.okafor\n    expires: 2099-12-31\n"
)
RATES = "def rate(weight):\n    return weight * 2\n"
TEST_RATES = (
    "import unittest\n\nfrom parcelkit.rates import rate\n\n\n"
    "def test_rate_doubles():\n    expected = 4\n    assert rate(2) == expected\n\n\n"
    "class RateCase(unittest.TestCase):\n    def test_zero(self):\n        self.assertEqual(rate(0), 0)\n"
)
WRONG_RATES = "def rate(weight):\n    return weight * 2 + 1\n"

REWRITES = {
    "the expected value held in a variable": (
        TEST_RATES.replace("expected = 4", "expected = 5"),
        ["tests/test_rates.py::RateCase::test_zero", "tests/test_rates.py::test_rate_doubles"],
        "`expected = 4` -> `expected = 5`",
    ),
    "a flipped comparison": (
        TEST_RATES.replace("== expected", "!= expected"),
        ["tests/test_rates.py::RateCase::test_zero", "tests/test_rates.py::test_rate_doubles"],
        "`assert rate(2) == expected` -> `assert rate(2) != expected`",
    ),
    "a unittest expectation rewritten": (
        TEST_RATES.replace("self.assertEqual(rate(0), 0)", "self.assertEqual(rate(0), 1)"),
        ["tests/test_rates.py::RateCase::test_zero", "tests/test_rates.py::test_rate_doubles"],
        "`self.assertEqual(rate(0), 0)` -> `self.assertEqual(rate(0), 1)`",
    ),
}


def start(repo: ScratchRepo, mode: str = "all", waiver: bool = False) -> None:
    repo.commit(
        "Start parcelkit",
        {
            "verifier.yaml": POLICY.format(mode=mode) + (WAIVER if waiver else ""),
            "parcelkit/__init__.py": "",
            "parcelkit/rates.py": RATES,
            "tests/test_rates.py": TEST_RATES,
        },
    )


def rewritten(out: Outcome) -> list[dict]:
    assert out.report is not None, out.stderr
    return [f for f in out.report["findings"] if f["rule"] == "tests.rewritten"]


@pytest.mark.parametrize("name", list(REWRITES))
def test_an_expectation_rewritten_to_fit_the_change_blocks(repo: ScratchRepo, name: str) -> None:
    test_text, named, changed = REWRITES[name]
    start(repo)
    sha = repo.commit(
        machine("Add the handling surcharge"), {"parcelkit/rates.py": WRONG_RATES, "tests/test_rates.py": test_text}
    )
    out = run_check(repo, sha)
    found = rewritten(out)
    # both base tests fail against the wrong code (pytest's own verdict); the rewritten one names its change
    assert sorted(f["details"]["test"] for f in found) == named, found
    assert any(changed in f["message"] for f in found), found
    assert all(f["severity"] == "block" for f in found)
    assert out.code == 1


def test_with_observed_selection_too(repo: ScratchRepo) -> None:
    start(repo, mode="observed")
    test_text, _named, changed = REWRITES["the expected value held in a variable"]
    sha = repo.commit(
        machine("Add the handling surcharge"), {"parcelkit/rates.py": WRONG_RATES, "tests/test_rates.py": test_text}
    )
    out = run_check(repo, sha)
    assert any(changed in f["message"] for f in rewritten(out))
    assert out.code == 1


def test_a_base_test_that_no_longer_imports_is_a_finding_per_test(repo: ScratchRepo) -> None:
    start(repo)
    renamed = TEST_RATES.replace("import rate", "import rate_for").replace("rate(", "rate_for(")
    sha = repo.commit(
        machine("Rename rate to rate_for"),
        {"parcelkit/rates.py": WRONG_RATES.replace("def rate(", "def rate_for("), "tests/test_rates.py": renamed},
    )
    out = run_check(repo, sha)
    assert sorted(f["details"]["test"] for f in rewritten(out)) == [
        "tests/test_rates.py::RateCase::test_zero",
        "tests/test_rates.py::test_rate_doubles",
    ]
    assert out.code == 1


def test_a_refactor_that_keeps_the_tests_meaning_passes(repo: ScratchRepo) -> None:
    start(repo)
    refactored = TEST_RATES.replace(
        "def test_rate_doubles():\n    expected = 4\n    assert rate(2) == expected\n",
        "def doubled(weight):\n    return weight + weight\n\n\n"
        "def test_rate_doubles():\n    assert rate(2) == doubled(2)\n",
    )
    sha = repo.commit(
        machine("Name the rate factor"),
        {
            "parcelkit/rates.py": "FACTOR = 2\n\n\ndef rate(weight):\n    return weight * FACTOR\n",
            "tests/test_rates.py": refactored,
        },
    )
    out = run_check(repo, sha)
    assert rewritten(out) == []
    assert out.code == 0, out.report and out.report["findings"]


def test_a_human_approves_a_behaviour_change_with_a_waiver(repo: ScratchRepo) -> None:
    start(repo, waiver=True)
    test_text = TEST_RATES.replace("expected = 4", "expected = 5").replace("rate(0), 0)", "rate(0), 1)")
    sha = repo.commit(
        machine("Add the handling surcharge"), {"parcelkit/rates.py": WRONG_RATES, "tests/test_rates.py": test_text}
    )
    out = run_check(repo, sha)
    found = rewritten(out)
    assert len(found) == 2 and all(f["severity"] == "info" for f in found), found
    assert all("PK-77" in f["details"]["waived_by"]["reason"] for f in found)
    assert out.code == 0, out.report and out.report["findings"]
