"""A new user's first contact with the command line, end to end with the real CLI on real repositories:
one clear message for a repository without tests, the doctor's single reasons and its word on ``auto``,
per-test progress on a terminal (a real pseudo-terminal) and none when piped, the failing assertion's
excerpt, a did-you-mean for rule ids, and counted nouns that agree with their number."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import ROOT

from verifier.demo.scratch import ScratchRepo


def verifier(repo: Path, *args: str, env: dict | None = None) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "verifier", "-C", str(repo), *args],
        capture_output=True,
        text=True,
        timeout=300,
        env={**os.environ, "PYTHONPATH": str(ROOT), "NO_COLOR": "1", **(env or {})},
    )


SUMS = "def add(a, b):\n    return a + b\n"


@pytest.fixture
def repo(tmp_path: Path) -> ScratchRepo:
    scratch = ScratchRepo(tmp_path / "repo")
    scratch.commit("Start inkwell", {"inkwell/__init__.py": "", "inkwell/sums.py": SUMS})
    return scratch


def test_a_misspelt_rule_id_gets_the_nearest_one(repo: ScratchRepo) -> None:
    done = verifier(repo.path, "rules", "covrage.new-lines")
    assert done.returncode == 2, done.stderr
    assert "unknown rule 'covrage.new-lines'; did you mean 'coverage.new-lines'?" in done.stderr
    assert "Traceback" not in done.stderr


def test_a_rule_id_near_nothing_gets_no_guess(repo: ScratchRepo) -> None:
    done = verifier(repo.path, "rules", "zzzz")
    assert done.returncode == 2 and "unknown rule 'zzzz'" in done.stderr and "did you mean" not in done.stderr


def test_a_known_rule_id_is_explained(repo: ScratchRepo) -> None:
    done = verifier(repo.path, "rules", "coverage.new-lines")
    assert done.returncode == 0 and done.stdout.startswith("coverage.new-lines: ")
