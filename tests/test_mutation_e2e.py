"""The mutation stage end to end: real repositories built with git, the real CLI, real pytest and coverage.

An assistant's favourite weak test calls the code on every branch and checks nothing: full coverage, no
assertion. These tests show the gate blocking it, passing the same code with real tests, and that what
it reports is true outside the gate too (a reported survivor applied to the file by a plain text
replacement still passes pytest's own run; a killed one fails it).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

from conftest import Outcome, machine, run_check, run_in_parts, snapshot

from verifier.demo.scratch import ScratchRepo

START = {
    "shop/__init__.py": "",
    "tests/__init__.py": "",
    "tests/test_start.py": "def test_start():\n    assert 1 + 1 == 2\n",
}
PRICE = '''\
def discount(total, member):
    """The discount in cents on an order of ``total`` cents."""
    if total >= 100 and member:
        return total // 10
    if total >= 100:
        return total // 20
    return 0
'''
# Calls every branch, asserts nothing: 100% coverage.
WEAK = """\
from shop.price import discount


def test_calls_every_branch():
    discount(200, True)
    discount(200, False)
    discount(50, False)
"""
STRONG = """\
import pytest

from shop.price import discount


@pytest.mark.parametrize(
    "total, member, expected",
    [(100, True, 10), (99, True, 0), (100, False, 5), (99, False, 0), (200, True, 20), (200, False, 10)],
)
def test_discount(total, member, expected):
    assert discount(total, member) == expected
"""


def start(repo: ScratchRepo, extra: dict[str, str] | None = None) -> None:
    repo.commit("Start the shop", {**START, **(extra or {})})


def report_of(out: Outcome) -> dict:
    assert out.report is not None, out.stderr
    return out.report


def mutation_findings(report: dict) -> list[dict]:
    return [f for f in report["findings"] if f["rule"] == "tests.mutant-survived"]


def pytest_on_mutant(repo: ScratchRepo, tmp_path: Path, mutant: dict, name: str) -> int:
    """Apply ``mutant`` to a separate checkout by plain text replacement and run pytest there."""
    tree = tmp_path / name
    repo.git("worktree", "add", "-q", "--detach", str(tree), "HEAD")
    target = tree / mutant["path"]
    text = target.read_text()
    assert text.count(mutant["original"] + "\n") >= 1  # the original is the file's exact text
    target.write_text(text.replace(mutant["original"] + "\n", mutant["mutated"] + "\n", 1))
    done = subprocess.run(
        [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", *mutant["tests"]],
        cwd=tree,
        capture_output=True,
        text=True,
    )
    return done.returncode


def test_assertion_free_tests_block_with_findings_on_the_surviving_lines(repo: ScratchRepo, tmp_path: Path) -> None:
    start(repo)
    repo.commit(machine("Add member discounts"), {"shop/price.py": PRICE, "tests/test_price.py": WEAK})
    before = snapshot(repo.path)
    out = run_check(repo, "HEAD")
    assert out.code == 1, out.stderr + out.stdout
    report = report_of(out)
    assert report["format"] == 3 and report["verdict"] == "block"
    assert report["coverage"]["percent"] == 100.0  # coverage alone would have passed it
    mutants = report["mutants"]
    assert mutants and {m["path"] for m in mutants} == {"shop/price.py"}  # test code is not mutated
    assert all(set(m) >= {"path", "line", "status", "original", "mutated", "tests"} for m in mutants)
    survivors = [m for m in mutants if m["status"] == "survived"]
    findings = mutation_findings(report)
    assert findings[0]["line"] is None and "mutants" in findings[0]["message"]  # the score, below 80%
    line_findings = {(f["path"], f["line"]) for f in findings if f["line"]}
    assert line_findings == {(m["path"], m["line"]) for m in survivors}
    assert all(f["severity"] == "block" for f in findings)
    assert "->" in findings[1]["message"] and "tests/test_price.py::test_calls_every_branch" in findings[1]["message"]
    assert report["mutation"]["score"] < 80 and report["mutation"]["survived"] == len(survivors)
    assert "surviving in shop/price.py:" in out.stdout
    assert snapshot(repo.path) == before  # the user's tree, index, refs and HEAD untouched
    note = json.loads(repo.git("notes", "--ref=refs/notes/verifier", "show", "HEAD"))  # git's own reader
    note = note["checks"][-1]  # notes format 2: one entry per check, the newest last
    assert note["mutants"]["survived"] == len(survivors) and note["mutants"]["score"] == report["mutation"]["score"]
    # Outside the gate: pytest itself passes with a reported survivor applied to the file.
    assert pytest_on_mutant(repo, tmp_path, survivors[0], "survivor") == 0

    again = run_check(repo, "HEAD")  # an unchanged commit: every outcome comes from the cache
    assert report_of(again)["mutation"]["cached"] == len([m for m in mutants if m["status"] != "not-run"])
    assert report_of(again)["mutants"] == [{**m, "cached": True} for m in mutants]
    assert again.code == 1


def test_the_same_function_with_real_tests_passes(repo: ScratchRepo, tmp_path: Path) -> None:
    start(repo)
    repo.commit(machine("Add member discounts"), {"shop/price.py": PRICE, "tests/test_price.py": STRONG})
    out = run_check(repo, "HEAD")
    assert out.code == 0, out.stdout + out.stderr
    report = report_of(out)
    assert report["verdict"] == "pass"
    assert report["mutation"]["score"] >= 80 and report["mutation"]["total"] >= 10
    killed = [m for m in report["mutants"] if m["status"] == "killed"]
    # Outside the gate: pytest itself fails with a killed mutant applied to the file.
    assert pytest_on_mutant(repo, tmp_path, killed[0], "killed") != 0


LOOPS = """\
import os


def count_up(n):
    i = 0
    while i < n:
        i += 1
    return i


def guard(code):
    if code != 0:
        os._exit(code)
    return "ok"
"""
LOOP_TESTS = """\
from shop.loops import count_up, guard


def test_count_up():
    assert count_up(3) == 3


def test_guard():
    assert guard(0) == "ok"
"""


def test_endless_loops_time_out_and_interpreter_exits_crash_both_count_as_killed(repo: ScratchRepo) -> None:
    # the code ends the interpreter on purpose (that is what its crash mutant needs), which tamper.means would
    # rightly flag: a human switched that rule off for this repository
    start(repo, {"verifier.yaml": "version: 1\nrules:\n  tamper.means: ignore\n"})
    repo.commit(machine("Add loops"), {"shop/loops.py": LOOPS, "tests/test_loops.py": LOOP_TESTS})
    out = run_check(repo, "HEAD")
    report = report_of(out)
    statuses = {(m["line"], m["mutated"].strip()): m["status"] for m in report["mutants"]}
    assert statuses[(7, "pass")] == "timeout"  # ``i += 1`` removed: the loop never ends
    assert statuses[(12, "if code == 0:")] == "crashed"  # guard(0) now calls os._exit(0)
    assert out.code == 0, out.stdout  # timeouts and crashes are kills
    assert report["mutation"]["timeout"] >= 1 and report["mutation"]["crashed"] >= 1


def test_a_waiver_on_a_line_accepts_its_survivor_and_the_policy_caps_mutants_per_line(repo: ScratchRepo) -> None:
    policy = (
        "version: 1\n"
        "rules:\n  tests.mutant-survived:\n    severity: block\n    per_line: 1\n"
        "waivers:\n  - rule: tests.mutant-survived\n    path: shop/price.py:7\n"
        "    reason: zero and None both mean no discount to the caller\n"
        "    owner: ada.okafor\n    expires: 2099-12-31\n"
    )
    start(repo, {"verifier.yaml": policy})
    repo.commit(machine("Add member discounts"), {"shop/price.py": PRICE, "tests/test_price.py": WEAK})
    out = run_check(repo, "HEAD")
    report = report_of(out)
    lines = [m["line"] for m in report["mutants"]]
    assert len(lines) == len(set(lines))  # at most one mutant per line
    waived = [f for f in mutation_findings(report) if f["line"] == 7]
    assert waived and waived[0]["severity"] == "info" and "waived_by" in waived[0]["details"]
    assert report["mutation"]["accepted"] == 1
    assert [w["path"] for w in report["waivers_used"]] == ["shop/price.py:7"]
    assert out.code == 1  # the other survivors still block


def test_parts_split_the_mutants_and_their_joined_reports_give_the_outcome_of_one_run(
    repo: ScratchRepo, tmp_path: Path
) -> None:
    start(repo, {"verifier.yaml": "version: 1\nselection:\n  reruns: 0\n"})
    repo.commit(
        machine("Add member discounts"),
        {"shop/price.py": PRICE, "tests/test_price.py": STRONG, "tests/test_price_weak.py": WEAK},
    )
    whole = run_check(repo, "HEAD")
    code, merged, parts = run_in_parts(repo, "HEAD", tmp_path)
    assert [part.code for part in parts] == [4, 4]  # a part has no verdict of its own

    def outcomes(report: dict) -> list[tuple]:
        return [(m["line"], m["mutated"], m["status"] == "survived", sorted(m["tests"])) for m in report["mutants"]]

    assert outcomes(merged) == outcomes(report_of(whole))
    assert (code, merged["verdict"]) == (whole.code, report_of(whole)["verdict"])
    assert merged["mutation"]["score"] == report_of(whole)["mutation"]["score"]


NEW_TESTS = """\
from shop.price import discount


def test_members_still_get_ten_percent():
    assert discount(200, True) == 20  # the same at base: it cannot show the change


def test_others_get_four_percent():
    assert discount(200, False) == 8  # 10 at base
"""


def test_a_new_test_that_passes_at_base_too_is_reported(repo: ScratchRepo) -> None:
    start(repo, {"shop/price.py": PRICE})
    changed = PRICE.replace("return total // 20", "return total // 25")
    files = {"shop/price.py": changed, "tests/test_new.py": NEW_TESTS}
    repo.commit(machine("Lower the discount of non-members"), files)
    out = run_check(repo, "HEAD")
    report = report_of(out)
    at_base = {entry["test"]: entry["status"] for entry in report["tests_at_base"]}
    assert at_base == {
        "tests/test_new.py::test_members_still_get_ten_percent": "survived",
        "tests/test_new.py::test_others_get_four_percent": "killed",
    }
    [finding] = [f for f in report["findings"] if f["rule"] == "tests.passes-at-base"]
    assert finding["severity"] == "info" and "test_members_still_get_ten_percent" in finding["message"]
    assert out.code == 0, out.stdout  # info by default; the line's mutants are all killed


NEW_UNITTEST = """\
import unittest

from shop.price import discount


class DiscountCheck(unittest.TestCase):  # pytest collects a unittest case whatever its name
    def test_members_still_get_ten_percent(self):
        self.assertEqual(discount(200, True), 20)

    def test_others_get_four_percent(self):
        self.assertEqual(discount(200, False), 8)
"""


def test_a_new_unittest_case_that_passes_at_base_too_is_reported(repo: ScratchRepo) -> None:
    start(repo, {"shop/price.py": PRICE})
    changed = PRICE.replace("return total // 20", "return total // 25")
    repo.commit(
        machine("Lower the discount of non-members"), {"shop/price.py": changed, "tests/test_new.py": NEW_UNITTEST}
    )
    report = report_of(run_check(repo, "HEAD"))
    at_base = {entry["test"]: entry["status"] for entry in report["tests_at_base"]}
    assert at_base == {
        "tests/test_new.py::DiscountCheck::test_members_still_get_ten_percent": "survived",
        "tests/test_new.py::DiscountCheck::test_others_get_four_percent": "killed",
    }
