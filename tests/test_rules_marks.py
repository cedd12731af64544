"""The machine marks hold: a scope that matches nothing, a mark outside the trailer block, whitespace-only
human edits, and a revert of a revert, each on real git repositories (and the gate end to end).

Where the trailer block is comes from git itself: each misplaced message is first shown to have no trailer
for ``git interpret-trailers --parse`` (source: git's own parser, run with the user's config shut out).
"""

from __future__ import annotations

import os
import subprocess

import pytest
from conftest import AGENT, machine, run_check, test_sandbox
from test_gate_docker_e2e import docker_ready  # noqa: F401  # the fixture that skips without an engine
from test_rules_support import context_for, findings

from verifier.demo.scratch import ScratchRepo

RATES = "def rate(weight):\n    return 4.5 * weight\n"
ZONES = "def zone(code):\n    return {'N': 'north', 'S': 'south'}[code]\n"
TEST_ZONES = "from parcelkit.zones import zone\n\n\ndef test_zone():\n    assert zone('N') == 'north'\n"
GIT_ENV = {**os.environ, "GIT_CONFIG_NOSYSTEM": "1", "GIT_CONFIG_GLOBAL": os.devnull, "LC_ALL": "C"}


def git_trailers(message: str) -> str:
    done = subprocess.run(
        ["git", "interpret-trailers", "--parse"], input=message.encode(), capture_output=True, env=GIT_ENV, check=True
    )
    return done.stdout.decode()


def start(repo: ScratchRepo) -> str:
    return repo.commit("Start parcelkit", {"parcelkit/__init__.py": "", "parcelkit/rates.py": RATES})


MISPLACED = {
    "middle paragraph": f"Add zones\n\nModel-Written: {AGENT}\n\nThe zone table is new.\n",
    "after the divider": f"Add zones\n\nThe zone table is new.\n---\nModel-Written: {AGENT}\n",
    "in the title": f"Model-Written: {AGENT}\n",
    "scope alone in the body": "Add zones\n\nModel-Written-Scope: parcelkit/\n\nThe zone table is new.\n",
}


@pytest.mark.parametrize("name", list(MISPLACED))
def test_mark_outside_the_trailer_block_is_a_finding(repo: ScratchRepo, name: str) -> None:
    message = MISPLACED[name]
    assert "Model-Written" not in git_trailers(message)  # git does not read it as a trailer either
    start(repo)
    sha = repo.commit(message, {"parcelkit/zones.py": ZONES})
    found = findings("marks.misplaced", context_for(repo, sha))
    assert [f.details["commit"] for f in found] == [sha]


def test_mark_in_the_trailer_block_and_prose_mentions_are_fine(repo: ScratchRepo) -> None:
    start(repo)
    marked = repo.commit(machine("Add zones"), {"parcelkit/zones.py": ZONES})
    assert "Model-Written" in git_trailers(machine("Add zones"))
    prose = repo.commit(
        "Explain the Model-Written trailer in the docs\n\nSee docs/trailers.md.\n", {"README.md": "x\n"}
    )
    assert findings("marks.misplaced", context_for(repo, marked)) == []
    assert findings("marks.misplaced", context_for(repo, prose)) == []


def test_scope_matching_no_changed_path(repo: ScratchRepo) -> None:
    start(repo)
    sha = repo.commit(machine("Add zones", scope="docs/**"), {"parcelkit/zones.py": ZONES})
    context = context_for(repo, sha)
    assert context.provenance.machine_lines == {}  # the scope made the whole commit human
    found = findings("marks.scope-unmatched", context)
    assert [f.details["paths"] for f in found] == [["parcelkit/zones.py"]]


def test_scope_in_a_range_is_judged_per_commit(repo: ScratchRepo) -> None:
    base = start(repo)
    repo.commit(machine("Add zones", scope="parcelkit/zones.py"), {"parcelkit/zones.py": ZONES})
    missing = repo.commit(machine("Add tests", scope="test/"), {"tests/test_zones.py": TEST_ZONES})
    found = findings("marks.scope-unmatched", context_for(repo, f"{base}..HEAD"))
    assert [f.details["commit"] for f in found] == [missing]


def test_scope_matching_its_paths_is_fine(repo: ScratchRepo) -> None:
    start(repo)
    sha = repo.commit(machine("Add zones", scope="parcelkit/"), {"parcelkit/zones.py": ZONES, "README.md": "x\n"})
    context = context_for(repo, sha)
    assert findings("marks.scope-unmatched", context) == []
    assert context.provenance.machine_lines == {"parcelkit/zones.py": (1, 2)}


def test_whitespace_only_human_edit_keeps_the_lines_machine_written(repo: ScratchRepo) -> None:
    """git blame -w (git-blame documentation: "Ignore whitespace when comparing the parent's version and the
    child's to find where the lines came from"): the human commit below changes only spaces."""
    base = start(repo)
    repo.commit(machine("Add zones"), {"parcelkit/zones.py": ZONES})
    spaced = ZONES.replace("return {", "return  {").replace("'N': 'north'", "'N' :  'north'")
    repo.commit("Reformat zones", {"parcelkit/zones.py": spaced})
    context = context_for(repo, f"{base}..HEAD")
    assert context.provenance.machine_lines == {"parcelkit/zones.py": (1, 2)}


def test_a_real_human_edit_makes_the_line_human(repo: ScratchRepo) -> None:
    base = start(repo)
    repo.commit(machine("Add zones"), {"parcelkit/zones.py": ZONES})
    repo.commit("Add the east zone", {"parcelkit/zones.py": ZONES.replace("'south'}", "'south', 'E': 'east'}")})
    assert context_for(repo, f"{base}..HEAD").provenance.machine_lines == {"parcelkit/zones.py": (1,)}


def test_moved_lines_are_still_followed(repo: ScratchRepo) -> None:
    """blame -M (kept with -w): a human commit that moves a machine-written function keeps its author."""
    base = start(repo)
    repo.commit(machine("Add zones"), {"parcelkit/zones.py": ZONES + "\n\nNORTH = 'N'\n"})
    moved = "NORTH = 'N'\n\n\n" + ZONES
    repo.commit("Constants first", {"parcelkit/zones.py": moved})
    lines = context_for(repo, f"{base}..HEAD").provenance.machine_lines["parcelkit/zones.py"]
    assert {4, 5} <= set(lines)


def test_revert_of_a_revert_stays_machine_written(repo: ScratchRepo) -> None:
    start(repo)
    written = repo.commit(machine("Add zones"), {"parcelkit/zones.py": ZONES})
    repo.git("revert", "--no-edit", written)
    first = repo.head()
    repo.git("revert", "--no-edit", first)
    again = repo.head()
    assert f"This reverts commit {first}." in repo.git("log", "-1", "--format=%B")  # git revert's own wording
    context = context_for(repo, again)
    assert context.provenance.machine_lines == {"parcelkit/zones.py": (1, 2)}
    assert context.provenance.marks[again].agent == AGENT
    # a plain revert of the machine commit takes the lines out: it is the person's act, not the model's
    assert context_for(repo, first).provenance.marks == {}


def test_gate_blocks_a_scope_that_hides_a_machine_commit(repo: ScratchRepo) -> None:
    repo.commit("Start parcelkit", {"parcelkit/__init__.py": "", "parcelkit/rates.py": RATES})
    sha = repo.commit(
        machine("Add zones", scope="docs/**"), {"parcelkit/zones.py": ZONES, "tests/test_zones.py": TEST_ZONES}
    )
    out = run_check(repo, sha)
    assert out.report is not None, out.stderr
    assert [f["rule"] for f in out.report["findings"]] == ["marks.scope-unmatched"]
    assert out.code == 1


def test_gate_blocks_a_mark_the_gate_cannot_read(repo: ScratchRepo) -> None:
    repo.commit("Start parcelkit", {"parcelkit/__init__.py": "", "parcelkit/rates.py": RATES})
    sha = repo.commit(MISPLACED["after the divider"], {"parcelkit/zones.py": ZONES, "tests/test_zones.py": TEST_ZONES})
    out = run_check(repo, sha)
    assert out.report is not None, out.stderr
    assert [f["rule"] for f in out.report["findings"]] == ["marks.misplaced"] and out.code == 1


def test_gate_passes_an_unmarked_human_commit(repo: ScratchRepo) -> None:
    repo.commit("Start parcelkit", {"parcelkit/__init__.py": "", "parcelkit/rates.py": RATES})
    sha = repo.commit("Add zones\n\nWritten by hand.\n", {"parcelkit/zones.py": ZONES})
    out = run_check(repo, sha)
    assert out.code == 0 and out.report is not None and out.report["findings"] == []


def test_gate_judges_a_machine_commit_that_only_deletes(repo: ScratchRepo) -> None:
    """A machine commit with no added line (it deletes a safety check and the test that pins it) still goes
    through the static rules: the deleted test is a finding, not a silent pass."""
    guarded = RATES.replace("    return", "    if weight < 0:\n        raise ValueError(weight)\n    return")
    test = (
        "import pytest\n\nfrom parcelkit.rates import rate\n\n\ndef test_rate():\n    assert rate(1) == 4.5\n\n\n"
        "def test_negative():\n    with pytest.raises(ValueError):\n        rate(-1)\n"
    )
    repo.commit(
        "Start parcelkit", {"parcelkit/__init__.py": "", "parcelkit/rates.py": guarded, "tests/test_rates.py": test}
    )
    cut = test[: test.index("\n\n\ndef test_negative")] + "\n"
    sha = repo.commit(machine("Simplify rates"), {"parcelkit/rates.py": RATES, "tests/test_rates.py": cut})
    out = run_check(repo, sha)
    assert out.report is not None, out.stderr
    weakened = [f["message"] for f in out.report["findings"] if f["rule"] == "tests.weakened"]
    assert weakened == ["test function test_negative deleted"] and out.code == 1


GUARDED_RATES = RATES.replace("    return", "    if weight < 0:\n        raise ValueError(weight)\n    return")
PINNED_TESTS = (
    "import pytest\n\nfrom parcelkit.rates import rate\n\n\ndef test_rate():\n    assert rate(1) == 4.5\n\n\n"
    "def test_negative():\n    with pytest.raises(ValueError):\n        rate(-1)\n"
)


def test_deleting_a_check_runs_the_tests_that_pin_it(repo: ScratchRepo) -> None:
    """Attack: a machine commit only deletes the safety check (no added line, the test left alone). The
    gate runs the tests anyway, and the human test that pins the check fails: BLOCK, not a silent pass."""
    deleting_a_check_is_blocked(repo, None)


@pytest.mark.docker
def test_deleting_a_check_runs_the_tests_in_docker(repo: ScratchRepo, docker_ready: None) -> None:  # noqa: F811
    deleting_a_check_is_blocked(repo, "docker")


def deleting_a_check_is_blocked(repo: ScratchRepo, sandbox: str | None) -> None:
    files = {"parcelkit/__init__.py": "", "parcelkit/rates.py": GUARDED_RATES, "tests/test_rates.py": PINNED_TESTS}
    repo.commit("Start parcelkit", files)
    sha = repo.commit(machine("Simplify rates"), {"parcelkit/rates.py": RATES})
    out = run_check(repo, sha, sandbox=sandbox)
    assert out.report is not None, out.stderr
    assert out.report["sandbox"] == (sandbox or test_sandbox()), out.stderr
    assert out.report["tests"]["failed_ids"] == ["tests/test_rates.py::test_negative"], out.stdout
    assert out.code == 1


def test_deleting_dead_code_passes(repo: ScratchRepo) -> None:
    """Honest: a machine commit deletes a function nothing uses; the tests run, all pass, and so does the gate."""
    dead = GUARDED_RATES + "\n\ndef legacy_rate(weight):\n    return 4.0 * weight\n"
    files = {"parcelkit/__init__.py": "", "parcelkit/rates.py": dead, "tests/test_rates.py": PINNED_TESTS}
    repo.commit("Start parcelkit", files)
    sha = repo.commit(machine("Drop the unused legacy rate"), {"parcelkit/rates.py": GUARDED_RATES})
    out = run_check(repo, sha)
    assert out.report is not None, out.stderr
    assert out.report["run"] is not None and out.report["run"]["status"] == "completed", out.stdout
    assert out.code == 0 and out.report["findings"] == [], out.stdout
