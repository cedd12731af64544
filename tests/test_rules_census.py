"""tests.lost end to end: a code change that makes an untouched human test skip itself (real pytest runs at
base and at head through the differential run), and the honest change that leaves the test running."""

from __future__ import annotations

from conftest import machine, run_check

from verifier.demo.scratch import ScratchRepo

# the honest change adds a constant no test reads: the mutation stage, not the subject here, is switched off
POLICY = "version: 1\nselection:\n  run: all\n  differential: true\nrules:\n  tests.mutant-survived: ignore\n"
SPEEDUPS = "NATIVE = True\n\n\ndef speed():\n    return 3\n"
# a human test that skips itself when the speedups are off (pytest documentation, skipif)
TEST_SPEEDUPS = (
    "import pytest\n\nfrom parcelkit import speedups\n\n\n"
    "@pytest.mark.skipif(not speedups.NATIVE, reason='no native speedups')\n"
    "def test_speed():\n    assert speedups.speed() == 3\n"
)


def start(repo: ScratchRepo) -> None:
    repo.commit(
        "Start parcelkit",
        {
            "verifier.yaml": POLICY,
            "parcelkit/__init__.py": "",
            "parcelkit/speedups.py": SPEEDUPS,
            "tests/test_speedups.py": TEST_SPEEDUPS,
        },
    )


def test_code_change_that_makes_a_human_test_skip_blocks(repo: ScratchRepo) -> None:
    start(repo)
    sha = repo.commit(machine("Turn the speedups off"), {"parcelkit/speedups.py": SPEEDUPS.replace("True", "False")})
    out = run_check(repo, sha)
    assert out.report is not None, out.stderr
    lost = [f for f in out.report["findings"] if f["rule"] == "tests.lost"]
    assert [f["message"].split(": ")[0] for f in lost] == [
        "tests/test_speedups.py::test_speed passed at base, skipped at head"
    ]
    assert out.code == 1


def test_change_that_keeps_the_test_running_passes(repo: ScratchRepo) -> None:
    start(repo)
    sha = repo.commit(machine("Name the speedups"), {"parcelkit/speedups.py": "NAME = 'native'\n" + SPEEDUPS})
    out = run_check(repo, sha)
    assert out.report is not None, out.stderr
    assert not [f for f in out.report["findings"] if f["rule"] == "tests.lost"]
    assert out.code == 0, out.report["findings"]
