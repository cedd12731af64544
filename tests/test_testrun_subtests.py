"""Subtests are judged like the tests they belong to: pytest 9 reports each ``self.subTest`` of a unittest
case and each ``subtests.test`` of the fixture as an extra report of the test's call (pytest's
documentation, "How to use subtests"; seen here: a unittest case whose subtest failed keeps a passing call
report of its own, the fixture's test gets a failing one).

Honest: a machine change tested with subtests passes (it used to end in "cannot verify": the extra call
reports looked like a phase recorded twice), its mutants are killed by a failing subtest, on one process
and across pytest-xdist workers. Wrong: a change that breaks one subtest of a unittest case blocks, though
pytest's own call report for that test says passed.
"""

from __future__ import annotations

import pytest
from conftest import Outcome, machine, run_check

from verifier.demo.scratch import ScratchRepo

RATES = "def rate(weight):\n    return weight * 2\n"
HALF = "def half(weight):\n    return weight / 2\n"
WRONG_HALF = "def half(weight):\n    if weight > 2:\n        return weight\n    return weight / 2\n"
UNITTEST = (
    "import unittest\n\nfrom parcelkit.half import half\n\n\n"
    "class HalfTest(unittest.TestCase):\n    def test_half(self):\n"
    "        for weight in (2, 4, 8):\n            with self.subTest(weight=weight):\n"
    "                self.assertEqual(half(weight), weight / 2)\n"
)
FIXTURE = (
    "from parcelkit.half import half\n\n\n"
    "def test_half(subtests):\n    for weight in (2, 4, 8):\n"
    "        with subtests.test(weight=weight):\n            assert half(weight) == weight / 2\n"
)
BASE = {
    "parcelkit/__init__.py": "",
    "parcelkit/rates.py": RATES,
    "tests/test_rates.py": "from parcelkit.rates import rate\n\n\ndef test_rate():\n    assert rate(2) == 4\n",
}


def check_half(repo: ScratchRepo, half: str, style: str, workers: int) -> Outcome:
    """A machine commit adding ``half`` and its subtests (in ``style``), checked with ``workers`` xdist workers."""
    repo.commit("Start parcelkit", {**BASE, "verifier.yaml": f"version: 1\nselection:\n  workers: {workers}\n"})
    test = UNITTEST if style == "unittest" else FIXTURE
    repo.commit(machine("Add half"), {"parcelkit/half.py": half, "tests/test_half.py": test})
    out = run_check(repo, "HEAD~1..HEAD")
    assert out.report is not None, out.stderr
    return out


@pytest.mark.parametrize("workers", [1, 2])
@pytest.mark.parametrize("style", ["unittest", "fixture"])
def test_a_change_tested_with_subtests_passes(repo: ScratchRepo, style: str, workers: int) -> None:
    out = check_half(repo, HALF, style, workers)
    report = out.report
    assert report is not None and (out.code, report["findings"]) == (0, []), out.stdout
    assert report["mutation"]["survived"] == 0 and report["mutation"]["killed"] > 0


@pytest.mark.parametrize("workers", [1, 2])
@pytest.mark.parametrize("style", ["unittest", "fixture"])
def test_a_change_that_breaks_one_subtest_blocks(repo: ScratchRepo, style: str, workers: int) -> None:
    out = check_half(repo, WRONG_HALF, style, workers)
    assert out.report is not None
    test = "tests/test_half.py::" + ("HalfTest::" if style == "unittest" else "") + "test_half"
    assert (out.report["tests"]["failed_ids"], out.code) == ([test], 1), out.stdout
