"""Names of our own: every name the interface gave up ends with exit 2 and a message naming the new one, on a
real repository through the real command line; the new names work."""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from tests.conftest import ROOT, machine
from verifier.demo.scratch import ScratchRepo
from verifier.errors import ExitCode

CODE = "def total(prices):\n    return sum(prices)\n"
TESTS = "from shop.cart import total\n\n\ndef test_total():\n    assert total([1, 2]) == 3\n"


def verifier(repo: ScratchRepo, *args: str, env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "verifier", "-C", str(repo.path), *args],
        capture_output=True,
        text=True,
        env={**os.environ, "PYTHONPATH": str(ROOT), **(env or {})},
        timeout=300,
    )


@pytest.fixture
def shop(repo: ScratchRepo) -> ScratchRepo:
    repo.commit("Human: start", {"shop/__init__.py": "", "README.md": "shop\n"})
    repo.commit(machine("Add the cart total"), {"shop/cart.py": CODE, "tests/test_cart.py": TESTS})
    return repo


@pytest.mark.parametrize(
    ("args", "new"),
    [
        (["check", "HEAD", "--shard", "1/2"], "'--shard' was renamed '--part'; use '--part 1/2'"),
        (["check", "HEAD", "--shard=2/2"], "'--shard' was renamed '--part'"),
        (["merge-reports", "a.json", "b.json"], "'merge-reports' was renamed 'join'"),
    ],
)
def test_an_old_command_line_name_stops_with_exit_2_naming_the_new_one(
    shop: ScratchRepo, args: list[str], new: str
) -> None:
    before = shop.head()
    done = verifier(shop, *args)
    assert done.returncode == ExitCode.USAGE, done.stderr
    assert new in done.stderr and "Traceback" not in done.stderr
    assert shop.head() == before


def test_the_old_names_are_not_offered_in_the_help(shop: ScratchRepo) -> None:
    top = verifier(shop, "--help").stdout
    check = verifier(shop, "check", "--help").stdout
    assert "join" in top and "merge-reports" not in top
    assert "--part K/N" in check and "--shard" not in check
