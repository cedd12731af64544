"""Git notes: one JSON note per checked commit, read back through git itself."""

from __future__ import annotations

import json
import os
from pathlib import Path

from conftest import machine, run_check

from verifier.demo import scenario as demo
from verifier.demo.scratch import ScratchRepo
from verifier.gitio import Git
from verifier.report import notes

BASE_FILES = {"parcelkit/__init__.py": "", "parcelkit/rates.py": demo.RATES, "tests/test_rates.py": demo.TEST_RATES}
FIELDS = {
    "format",
    "tool",
    "version",
    "checked_at",
    "commit",
    "range",
    "verdict",
    "agent",
    "machine_lines",
    "coverage",
    "tests",
    "findings",
    "waivers",
    "sandbox",
    "mutants",
}


def shown(repo: ScratchRepo, sha: str, ref: str = notes.DEFAULT_REF) -> dict:
    """The note as git itself shows it (`git notes show`), parsed."""
    return json.loads(repo.git("notes", f"--ref={ref}", "show", sha))


def test_a_checked_range_gets_one_note_per_commit(repo: ScratchRepo) -> None:
    base = repo.commit("Start parcelkit", BASE_FILES)
    human = repo.commit("Human: readme", {"README.md": "# parcelkit\n"})
    marked = repo.commit(
        machine("Add zones"), {"parcelkit/zones.py": demo.ZONES, "tests/test_zones.py": demo.TEST_ZONES}
    )
    out = run_check(repo, f"{base}..HEAD")
    assert out.report is not None, out.stderr
    listed = repo.git("notes", f"--ref={notes.DEFAULT_REF}", "list").split()
    assert sorted(listed[1::2]) == sorted([human, marked])  # `git notes list`: "<note blob> <commit>" pairs
    body = shown(repo, marked)
    assert set(body) == FIELDS
    assert body["format"] == 1 and body["tool"] == "verifier" and body["commit"] == marked
    assert body["range"] == {"base": base, "head": marked}
    assert body["verdict"] == "block" == out.report["verdict"]
    assert body["agent"] == demo.AGENT
    assert body["machine_lines"] == sum(len(lines) for lines in out.report["machine_lines"].values())
    assert body["checked_at"].endswith("Z")
    assert body["coverage"] == {key: out.report["coverage"][key] for key in ("executable", "covered", "percent")}
    assert body["tests"] == {"run": out.report["tests"]["run"], "failed": 0}
    assert body["sandbox"] == out.report["sandbox"]
    assert {f["rule"] for f in body["findings"]} == {f["rule"] for f in out.report["findings"]}
    assert all(set(f) == {"rule", "severity", "path", "line", "message"} for f in body["findings"])
    assert shown(repo, human)["agent"] is None and shown(repo, human)["machine_lines"] == 0
    assert notes.read_notes(Git(repo.path)) == {human: shown(repo, human), marked: body}


def test_a_rerun_replaces_the_note_and_no_notes_skips(repo: ScratchRepo) -> None:
    repo.commit("Start parcelkit", BASE_FILES)
    sha = repo.commit("Human tweak", {"README.md": "x\n"})
    assert run_check(repo, sha, "--no-notes").code == 0
    assert repo.git("for-each-ref", "refs/notes/") == ""
    run_check(repo, sha)
    run_check(repo, sha)
    assert len(repo.git("notes", f"--ref={notes.DEFAULT_REF}", "list").splitlines()) == 1
    assert len(repo.git("rev-list", notes.DEFAULT_REF).split()) == 2  # two writes, the second replaced the first


def test_the_notes_ref_is_configurable(repo: ScratchRepo) -> None:
    repo.commit("Start parcelkit", BASE_FILES)
    sha = repo.commit("Human tweak", {"README.md": "x\n"})
    run_check(repo, sha, "--notes-ref", "gate-audit")
    assert shown(repo, sha, "refs/notes/gate-audit")["commit"] == sha
    repo.git("config", "verifier.notesRef", "refs/notes/from-config")
    run_check(repo, sha)
    assert shown(repo, sha, "refs/notes/from-config")["commit"] == sha
    assert repo.git("for-each-ref", "--format=%(refname)", notes.DEFAULT_REF) == ""


def test_a_note_that_is_not_json_is_reported_as_invalid(repo: ScratchRepo) -> None:
    sha = repo.commit("Start parcelkit", BASE_FILES)
    repo.git("notes", f"--ref={notes.DEFAULT_REF}", "add", "-m", "hand-written, not JSON", sha)
    found = notes.read_notes(Git(repo.path))[sha]
    assert found["format"] is None and "not JSON" in found["invalid"]


def test_notes_are_written_without_a_git_identity(tmp_path: Path) -> None:
    repo = ScratchRepo(tmp_path / "repo")
    sha = repo.commit("Start parcelkit", BASE_FILES)
    repo.git("config", "--unset", "user.name")
    repo.git("config", "--unset", "user.email")
    home = tmp_path / "home"
    home.mkdir()
    anonymous = {"HOME": str(home), "XDG_CONFIG_HOME": str(home), "GIT_CONFIG_NOSYSTEM": "1", "EMAIL": ""}
    for key in ("GIT_AUTHOR_NAME", "GIT_AUTHOR_EMAIL", "GIT_COMMITTER_NAME", "GIT_COMMITTER_EMAIL"):
        anonymous[key] = ""
    env = {k: v for k, v in {**os.environ, **anonymous}.items() if v != "" or k == "EMAIL"}
    out = run_check(repo, sha, env=env)
    assert out.code == 0, out.stderr
    assert "could not write" not in out.stderr
    assert shown(repo, sha)["commit"] == sha


def test_a_pending_verdict_only_annotates_the_commit_it_was_for(repo: ScratchRepo, tmp_path: Path) -> None:
    """The staged verdict waits under the git dir keyed by tree; another tree or parent gets no note."""
    from verifier.change.stage import RevisionSpec
    from verifier.pipeline import verify

    repo.commit("Start parcelkit", BASE_FILES)
    git = Git(repo.path)
    repo.write({"README.md": "staged\n"})
    repo.git("add", "README.md")
    tree = notes.staged_tree(git)
    # `git write-tree` on the real index is the outside reference for the tree the index would commit.
    assert tree == repo.git("write-tree").strip()
    repo.git("reset", "-q")  # an empty staged change is verified without a test run
    report = verify(repo.path, RevisionSpec(staged=True, message=machine("Readme")))
    notes.save_pending(git, report, notes.staged_tree(git))
    repo.commit("Something else entirely", {"README.md": "different\n"})
    assert notes.note_pending(git) is None
    assert not (notes.state_dir(git) / "pending").exists()

    repo.git("reset", "-q", "--hard", "HEAD~1")
    notes.save_pending(git, report, notes.staged_tree(git))
    sha = repo.commit(machine("Readme"))  # --allow-empty: the tree is the parent's, as staged
    assert notes.note_pending(git) == sha
    assert shown(repo, sha)["range"]["head"] == sha and shown(repo, sha)["agent"] == demo.AGENT
