"""Old failures are not new failures, end to end: a test that already fails at the base revision is
reported as pre-existing and does not block a change that did not cause it (unless the policy says so);
what the change breaks, or a new failing test, still blocks. Real git, real pytest runs at head and base."""

from __future__ import annotations

from conftest import machine, run_check

from verifier.demo import scenario as demo
from verifier.demo.scratch import ScratchRepo

BASE_FILES = {"parcelkit/__init__.py": "", "parcelkit/rates.py": demo.RATES, "tests/test_rates.py": demo.TEST_RATES}
# A human left a failing test on the main line (the price of two kilos is 6.90, not 7.00).
ALREADY_FAILING = """from parcelkit.rates import price


def test_price_of_two_kilos():
    assert price(2) == 7.00
"""
VOLUME = {"parcelkit/volume.py": demo.VOLUME, "tests/test_volume.py": demo.TEST_VOLUME}
OLD = "tests/test_two_kilos.py::test_price_of_two_kilos"


def start(repo: ScratchRepo, policy: str | None = None) -> None:
    files = {**BASE_FILES, "tests/test_two_kilos.py": ALREADY_FAILING}
    repo.commit("Start parcelkit, with a known failure", {**files, **({"verifier.yaml": policy} if policy else {})})


def failing(report: dict) -> dict[str, dict]:
    return {f["message"].split(" ", 1)[0]: f for f in report["findings"] if f["rule"] == "tests.failing"}


def test_a_failure_present_at_base_does_not_block_an_honest_change(repo: ScratchRepo) -> None:
    start(repo)
    sha = repo.commit(machine("Volumetric weight"), VOLUME)
    out = run_check(repo, sha)
    assert out.code == 0, out.stderr
    assert out.report is not None and out.report["verdict"] == "warn"
    [old] = failing(out.report).values()
    assert old["severity"] == "warn" and "pre-existing" in old["message"] and OLD in old["message"]
    assert out.report["tests"]["differential"]["still-failing"] == [OLD]  # from the base run the gate made


def test_what_the_change_breaks_still_blocks_beside_an_old_failure(repo: ScratchRepo) -> None:
    start(repo)
    sha = repo.commit(machine("Simpler rounding"), {"parcelkit/rates.py": demo.ROUNDING})
    out = run_check(repo, sha)
    assert out.code == 1, out.stderr
    found = failing(out.report)
    assert found["tests/test_rates.py::test_price_of_one_kilo"]["severity"] == "block"
    assert "pre-existing" not in found["tests/test_rates.py::test_price_of_one_kilo"]["message"]
    assert found[OLD]["severity"] == "warn"


def test_a_new_failing_test_is_not_pre_existing(repo: ScratchRepo) -> None:
    """An assistant cannot pass off a failure as old by adding the test that fails."""
    start(repo)
    new_test = ALREADY_FAILING.replace("two_kilos", "three_kilos").replace("price(2) == 7.00", "price(3) == 1.0")
    sha = repo.commit(machine("Three kilos"), {"tests/test_three_kilos.py": new_test})
    out = run_check(repo, sha)
    assert out.code == 1, out.stderr
    assert failing(out.report)["tests/test_three_kilos.py::test_price_of_three_kilos"]["severity"] == "block"


def test_the_policy_can_block_pre_existing_failures_too(repo: ScratchRepo) -> None:
    start(repo, "version: 1\nrules:\n  tests.failing:\n    block_pre_existing: true\n")
    sha = repo.commit(machine("Volumetric weight"), VOLUME)
    out = run_check(repo, sha)
    assert out.code == 1, out.stderr
    assert failing(out.report)[OLD]["severity"] == "block"
