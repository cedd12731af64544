"""Which files are test code follows what pytest would collect, not the name pattern alone.

Attack: machine-written code hidden in a module named like a test (``parcelkit/test_pricing.py``, which
defines no test) used to be skipped by the coverage rule. Honest: a machine-written test file and its
helper module next to it are still test code, not judged for coverage (nor mutated).
The collection rules quoted (``test_*.py`` / ``*_test.py`` files, ``test`` functions, ``Test`` classes) are
pytest's documented defaults.
"""

from __future__ import annotations

from conftest import machine, run_check

from verifier.demo import scenario as demo
from verifier.demo.scratch import ScratchRepo
from verifier.testrun.testfiles import classify_test_code

PATTERNS = ("tests/**", "**/test_*.py", "**/*_test.py", "**/conftest.py")
BASE = {"parcelkit/__init__.py": "", "parcelkit/rates.py": demo.RATES, "tests/test_rates.py": demo.TEST_RATES}
DISCOUNT = "def discount(total):\n    return total * 0.9\n"
TEST = "from parcelkit.discount import discount\n\n\ndef test_discount():\n    assert discount(10) == 9\n"
REFUND = "def refund(total):\n    if total < 0:\n        raise ValueError(total)\n    return -total\n"


def test_a_test_named_module_without_tests_is_code() -> None:
    sources = {"parcelkit/test_pricing.py": REFUND, "tests/test_rates.py": demo.TEST_RATES}
    is_test = classify_test_code(PATTERNS, sources)
    assert not is_test("parcelkit/test_pricing.py")  # pytest would collect nothing there
    assert not is_test("parcelkit/rates.py")
    assert is_test("tests/test_rates.py")


def test_helpers_conftest_and_test_classes_are_test_code() -> None:
    case = "import unittest\n\n\nclass KiloCheck(unittest.TestCase):\n    def test_kilo(self):\n        pass\n"
    sources = {
        "tests/test_units.py": "class TestUnits:\n    def test_kilo(self):\n        assert 1\n",
        "tests/test_cases.py": case,
    }
    is_test = classify_test_code(PATTERNS, sources)
    assert is_test("tests/test_units.py") and is_test("tests/helpers.py") and is_test("parcelkit/conftest.py")
    assert is_test("tests/test_cases.py")  # a unittest case, whatever its name


def test_code_hidden_in_a_test_named_module_is_judged(repo: ScratchRepo) -> None:
    repo.commit("Start parcelkit", BASE)
    hidden = "from parcelkit.test_pricing import refund\n\n\n" + DISCOUNT
    files = {"parcelkit/discount.py": hidden, "parcelkit/test_pricing.py": REFUND, "tests/test_discount.py": TEST}
    repo.commit(machine("Add a discount"), files)
    out = run_check(repo, "HEAD~1..HEAD")
    assert out.report is not None, out.stderr
    uncovered = [f for f in out.report["findings"] if f["path"] == "parcelkit/test_pricing.py"]
    assert out.code == 1 and uncovered, out.report["findings"]


def test_machine_written_tests_helpers_and_conftest_pass(repo: ScratchRepo) -> None:
    repo.commit("Start parcelkit", BASE)
    helper = "def tenth_off(total):\n    return total - total / 10\n"
    test = (
        "from helpers import tenth_off\n\nfrom parcelkit.discount import discount\n\n\n"
        "def test_discount():\n    assert discount(10) == tenth_off(10) == 9\n"
    )
    files = {"parcelkit/discount.py": DISCOUNT, "tests/helpers.py": helper, "tests/test_discount.py": test}
    repo.commit(machine("Add a discount"), files)
    out = run_check(repo, "HEAD~1..HEAD")
    assert out.report is not None, out.stderr
    assert out.code == 0 and out.report["findings"] == [], out.report["findings"]
