"""Names of our own: every name the interface gave up ends with exit 2 and a message naming the new one, on a
real repository through the real command line; the new names work."""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest

from tests.conftest import ROOT, machine, run_check, test_sandbox
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


# --- the policy file's keys and values ------------------------------------------------------------------

OLD_POLICIES = [
    ("extends: strict\n", "extends", "was renamed 'builds_on'; write builds_on: strict"),
    ("overrides:\n  - paths: [legacy/**]\n", "overrides", "was renamed 'paths'; write paths: {"),
    ("selection:\n  mode: smart\n", "selection.mode", "was renamed 'selection.run'"),
    ("selection:\n  run: smart\n", "selection.run", "the value 'smart' was renamed 'observed'"),
    ("rules:\n  patch.size: warn\n", "rules.patch.size", "the setting 'warn' was renamed 'advise'"),
    ("rules:\n  patch.size: {severity: off}\n", "rules.patch.size.severity", "the setting 'off' was renamed 'ignore'"),
]


@pytest.mark.parametrize(("text", "key", "new"), OLD_POLICIES)
def test_an_old_policy_key_or_value_stops_policy_check_naming_the_file_key_and_new_spelling(
    shop: ScratchRepo, text: str, key: str, new: str
) -> None:
    candidate = shop.path / "candidate.yaml"
    candidate.write_text(f"version: 1\n{text}")
    done = verifier(shop, "policy", "check", str(candidate))
    assert done.returncode == ExitCode.USAGE and "Traceback" not in done.stderr
    assert f"{candidate}:" in done.stderr and f"key '{key}'" in done.stderr and new in done.stderr


@pytest.mark.parametrize(("text", "key", "new"), OLD_POLICIES[:3])
def test_an_old_policy_at_the_base_revision_stops_the_check(repo: ScratchRepo, text: str, key: str, new: str) -> None:
    """The policy is read at the base: a repository still spelling the old keys gets exit 2, never a run
    that quietly ignores what its policy asked for."""
    repo.commit("Human: start", {"shop/__init__.py": "", "verifier.yaml": f"version: 1\n{text}"})
    sha = repo.commit(machine("Add the cart total"), {"shop/cart.py": CODE, "tests/test_cart.py": TESTS})
    done = verifier(repo, "check", sha, "--sandbox", test_sandbox())
    assert done.returncode == ExitCode.USAGE, done.stderr
    assert ":verifier.yaml:" in done.stderr and f"key '{key}'" in done.stderr and new in done.stderr


NEW_POLICY = """version: 1
builds_on: strict
selection:
  run: observed
paths:
  "legacy/**":
    coverage: {threshold: 0}
    rules:
      patch.size: ignore
rules:
  deps.added: advise
"""


def test_the_new_names_are_read_and_applied(repo: ScratchRepo) -> None:
    """builds_on strict (coverage 100%), a path glob's own threshold, advise and ignore: an untested legacy
    file passes under its glob's threshold while the untested line outside it blocks under strict's 100%."""
    repo.commit("Human: start", {"shop/__init__.py": "", "legacy/__init__.py": "", "verifier.yaml": NEW_POLICY})
    shown = verifier(repo, "policy", "show")
    assert shown.returncode == 0, shown.stderr
    assert "shipped:strict.yaml" in shown.stdout and 'selection.run = "observed"' in shown.stdout
    assert 'paths.legacy/**.rules.patch.size.severity = "ignore"' in shown.stdout
    assert 'rules.deps.added.severity = "advise"' in shown.stdout
    legacy = "def old(rate):\n    return rate * 2\n"
    sha = repo.commit(
        machine("Add the cart total"),
        {"legacy/old.py": legacy, "shop/cart.py": CODE + legacy, "tests/test_cart.py": TESTS},
    )
    out = run_check(repo, sha)
    assert out.report is not None, out.stderr
    uncovered = {f["path"] for f in out.report["findings"] if f["rule"] == "coverage.new-lines" and f["path"]}
    assert uncovered == {"shop/cart.py"} and out.code == ExitCode.BLOCK, [f["rule"] for f in out.report["findings"]]


def test_join_refuses_a_report_written_with_the_old_option_naming_the_new_one(shop: ScratchRepo) -> None:
    """A report of format 2 kept its part under "shard": join says to write it again with --part."""
    old = shop.path.parent / "old-part.json"
    old.write_text(json.dumps({"format": 2, "verdict": "block", "shard": {"index": 1, "total": 2}}))
    done = verifier(shop, "join", str(old))
    assert done.returncode == ExitCode.USAGE and "Traceback" not in done.stderr
    assert "renamed --part" in done.stderr and "verifier check --part K/N" in done.stderr
