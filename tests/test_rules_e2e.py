"""The static rules inside the real gate: ``verifier check`` on scratch repositories, JSON report read back."""

from __future__ import annotations

from conftest import machine, run_check

from verifier.demo import scenario as demo
from verifier.demo.scratch import ScratchRepo

BASE_FILES = {"parcelkit/__init__.py": "", "parcelkit/rates.py": demo.RATES, "tests/test_rates.py": demo.TEST_RATES}

SHELL_HELPER = """import os as system_tools


def archive(folder: str) -> int:
    return system_tools.system("tar czf parcels.tgz " + folder)
"""
TEST_SHELL_HELPER = """from parcelkit.shipping import archive


def test_archive_runs(tmp_path):
    assert archive(str(tmp_path)) == 0
"""


def test_banned_call_blocks_a_tested_change(repo: ScratchRepo) -> None:
    repo.commit("Start parcelkit", BASE_FILES)
    sha = repo.commit(
        machine("Archive parcels"), {"parcelkit/shipping.py": SHELL_HELPER, "tests/test_shipping.py": TEST_SHELL_HELPER}
    )
    out = run_check(repo, sha)
    assert out.report is not None, out.stderr
    banned = [f for f in out.report["findings"] if f["rule"] == "calls.banned"]
    assert [(f["path"], f["line"], f["severity"]) for f in banned] == [("parcelkit/shipping.py", 5, "block")]
    assert "CWE-78" in banned[0]["message"]
    assert out.report["verdict"] == "block" and out.code == 1


def test_changed_expectation_warns_statically_and_its_base_version_blocks_it(repo: ScratchRepo) -> None:
    # the static rule cannot tell a fix from a fit (a warning); the test's base version, run against the
    # head code, fails: the behaviour changed, which a machine commit may not do without a waiver
    repo.commit("Start parcelkit", BASE_FILES)
    sha = repo.commit(
        machine("Raise the base rate"),
        {
            "parcelkit/rates.py": demo.RATES.replace("BASE_RATE = 4.50", "BASE_RATE = 4.80"),
            "tests/test_rates.py": demo.TEST_RATES.replace("== 5.70", "== 6.00"),
        },
    )
    out = run_check(repo, sha)
    assert out.report is not None, out.stderr
    weakened = [f for f in out.report["findings"] if f["rule"] == "tests.weakened"]
    assert [(f["line"], f["severity"]) for f in weakened] == [(6, "warn")]
    assert "5.7 -> 6.0" in weakened[0]["message"]
    rewritten = [f for f in out.report["findings"] if f["rule"] == "tests.rewritten"]
    assert rewritten and all(f["severity"] == "block" and f["path"] == "tests/test_rates.py" for f in rewritten)
    assert out.report["verdict"] == "block" and out.code == 1


def test_team_entry_from_the_base_policy_file(repo: ScratchRepo) -> None:
    policy = (
        "version: 1\n"
        "rules:\n"
        "  calls.banned:\n"
        "    severity: block\n"
        "    entries:\n"
        "      - call: parcelkit.rates.price\n"
        "        when: {arg: 0, is: literal}\n"
        "        why: prices come from the tariff table, not from constants in code\n"
    )
    repo.commit("Start parcelkit", {**BASE_FILES, "verifier.yaml": policy})
    module = "from parcelkit import rates as r\n\n\ndef flat_fee() -> float:\n    return r.price(2)\n"
    test = "from parcelkit.fees import flat_fee\n\n\ndef test_flat_fee():\n    assert flat_fee() == 6.9\n"
    sha = repo.commit(machine("Add a flat fee"), {"parcelkit/fees.py": module, "tests/test_fees.py": test})
    out = run_check(repo, sha)
    assert out.report is not None, out.stderr
    banned = [(f["path"], f["line"]) for f in out.report["findings"] if f["rule"] == "calls.banned"]
    assert banned == [("parcelkit/fees.py", 5)]
    assert out.report["verdict"] == "block"
