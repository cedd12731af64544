"""The policy is the team's, always: end to end with real git and the real CLI.

The command line cannot pick a sandbox the trusted policy forbids; every file the trusted policy is
built from is protected like verifier.yaml; an organisation policy inside the repository under review is
refused. Each attack has its honest counterpart that still passes.
"""

from __future__ import annotations

from pathlib import Path

from conftest import machine, run_check

from verifier.demo import scenario as demo
from verifier.demo.scratch import ScratchRepo

BASE_FILES = {"parcelkit/__init__.py": "", "parcelkit/rates.py": demo.RATES, "tests/test_rates.py": demo.TEST_RATES}
VOLUME = {"parcelkit/volume.py": demo.VOLUME, "tests/test_volume.py": demo.TEST_VOLUME}
ALLOW_PROCESS = "version: 1\nsandbox:\n  allow_process: true\n"
TEAM_POLICY = "version: 1\ncoverage:\n  threshold: 95\n"
EXTENDS_TEAM = "version: 1\nbuilds_on: config/gate-team.yaml\n"


def test_the_command_line_cannot_choose_a_sandbox_the_policy_forbids(repo: ScratchRepo) -> None:
    repo.commit("Start parcelkit", BASE_FILES)
    sha = repo.commit(machine("Volume"), VOLUME)
    out = run_check(repo, sha, sandbox="process")
    assert out.code == 2, out.stderr
    assert "shipped default policy" in out.stderr and "sandbox.allow_process" in out.stderr
    assert out.report is not None and out.report["verdict"] == "error" and out.report["exit_code"] == 2


def test_a_change_cannot_allow_the_process_sandbox_for_itself(repo: ScratchRepo) -> None:
    """The change's own verifier.yaml is not read: the base's policy (none here) still forbids it."""
    repo.commit("Start parcelkit", BASE_FILES)
    sha = repo.commit(machine("Volume, and a looser sandbox"), {**VOLUME, "verifier.yaml": ALLOW_PROCESS})
    out = run_check(repo, sha, sandbox="process")
    assert out.code == 2 and "sandbox.allow_process" in out.stderr, out.stderr


def test_a_policy_that_allows_the_process_sandbox_lets_the_command_line_choose_it(repo: ScratchRepo) -> None:
    repo.commit("Start parcelkit", {**BASE_FILES, "verifier.yaml": ALLOW_PROCESS})
    sha = repo.commit(machine("Volume"), VOLUME)
    out = run_check(repo, sha, sandbox="process")
    assert out.code == 0, out.stderr
    assert out.report is not None and out.report["sandbox"] == "process" and out.report["verdict"] == "pass"


def test_a_machine_edit_of_a_file_the_policy_extends_is_blocked(repo: ScratchRepo) -> None:
    """config/gate-team.yaml matches none of paths.protected's globs; it is protected because the trusted
    policy at base is built on it (an edit would relax the policy for the next change)."""
    repo.commit("Start parcelkit", {**BASE_FILES, "verifier.yaml": EXTENDS_TEAM, "config/gate-team.yaml": TEAM_POLICY})
    sha = repo.commit(
        machine("Lower the bar a little"), {"config/gate-team.yaml": TEAM_POLICY.replace("95", "10"), **VOLUME}
    )
    out = run_check(repo, sha)
    assert out.code == 1, out.stderr
    assert out.report is not None
    protected = [f for f in out.report["findings"] if f["rule"] == "paths.protected"]
    assert [f["path"] for f in protected] == ["config/gate-team.yaml"] and protected[0]["severity"] == "block"


def test_a_human_edit_of_the_extended_policy_and_a_later_machine_change_pass(repo: ScratchRepo) -> None:
    repo.commit("Start parcelkit", {**BASE_FILES, "verifier.yaml": EXTENDS_TEAM, "config/gate-team.yaml": TEAM_POLICY})
    human = repo.commit("Team: coverage bar at 90", {"config/gate-team.yaml": TEAM_POLICY.replace("95", "90")})
    assert run_check(repo, human).code == 0
    sha = repo.commit(machine("Volume"), VOLUME)
    out = run_check(repo, sha)
    assert out.code == 0, out.stderr
    assert out.report is not None and "config/gate-team.yaml" in out.report["policy"]
    assert not [f for f in out.report["findings"] if f["rule"] == "paths.protected"]


def test_an_organisation_policy_inside_the_checked_repository_is_refused(repo: ScratchRepo, tmp_path: Path) -> None:
    repo.commit("Start parcelkit", {**BASE_FILES, "org/gate.yaml": ALLOW_PROCESS})
    sha = repo.commit(machine("Volume"), VOLUME)
    inside = repo.path / "org" / "gate.yaml"
    by_option = run_check(repo, sha, "--org-policy", str(inside))
    assert by_option.code == 2 and "inside the repository being checked" in by_option.stderr, by_option.stderr
    by_environment = run_check(repo, sha, env={"VERIFIER_ORG_POLICY": str(inside)})
    assert by_environment.code == 2 and "inside the repository being checked" in by_environment.stderr


def test_an_organisation_policy_outside_the_repository_is_used(repo: ScratchRepo, tmp_path: Path) -> None:
    repo.commit("Start parcelkit", BASE_FILES)
    sha = repo.commit(machine("Volume"), VOLUME)
    outside = tmp_path / "org-policy.yaml"
    outside.write_text("version: 1\ncoverage:\n  threshold: 80\n")
    out = run_check(repo, sha, "--org-policy", str(outside))
    assert out.code == 0, out.stderr
    assert out.report is not None and str(outside) in out.report["policy"]
