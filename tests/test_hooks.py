"""The git hooks, with real ``git commit`` and ``git push`` in temporary repositories.

The hooks are installed by the real CLI; git runs them (githooks(5)); the sandbox is the one the other
end-to-end tests use (``verifier.sandbox`` in the repository's git config, which the hooks read).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import ROOT, machine, snapshot, test_sandbox

from verifier.demo import scenario as demo
from verifier.demo.scratch import IDENTITY, ScratchRepo
from verifier.gitio import Git
from verifier.integration import hooks
from verifier.report.notes import latest_check, read_notes

BASE_FILES = {"parcelkit/__init__.py": "", "parcelkit/rates.py": demo.RATES, "tests/test_rates.py": demo.TEST_RATES}
NOTES_REF = "refs/notes/verifier"
EXISTING_HOOK = """#!/bin/sh
# a team's own commit-msg hook: records that it ran, refuses messages that say REJECT
echo ran >> "$(git rev-parse --git-dir)/team-hook-ran"
if grep -q REJECT "$1"; then echo "team hook: no" >&2; exit 1; fi
"""


def cli(cwd: Path, *args: str, env: dict | None = None) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "verifier", *args],
        cwd=cwd,
        capture_output=True,
        text=True,
        env={**os.environ, "PYTHONPATH": str(ROOT), **(env or {})},
    )


def git(cwd: Path, *args: str, env: dict | None = None, message: str | None = None) -> subprocess.CompletedProcess:
    """A real git command; the hooks inherit this environment (no PYTHONPATH: they must find us themselves)."""
    clean = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    return subprocess.run(
        ["git", *args], cwd=cwd, capture_output=True, text=True, input=message, env={**clean, **IDENTITY, **(env or {})}
    )


def commit(cwd: Path, message: str, *extra: str, env: dict | None = None) -> subprocess.CompletedProcess:
    return git(cwd, "commit", "-q", *extra, "-F", "-", env=env, message=message)


def notes_of(cwd: Path) -> dict[str, dict]:
    """Each commit's newest check, as the note holds it (format 2 keeps one entry per check)."""
    return {sha: latest_check(body) or body for sha, body in read_notes(Git(cwd), NOTES_REF).items()}


def hooked(path: Path) -> ScratchRepo:
    repo = ScratchRepo(path)
    repo.commit("Start parcelkit", BASE_FILES)
    repo.git("config", "verifier.sandbox", test_sandbox())
    installed = cli(repo.path, "hooks", "install")
    assert installed.returncode == 0, installed.stderr
    return repo


@pytest.fixture
def hrepo(tmp_path: Path) -> ScratchRepo:
    return hooked(tmp_path / "repo")


def test_blocked_commit_changes_nothing_and_the_saved_message_is_reusable(hrepo: ScratchRepo) -> None:
    hrepo.write({"parcelkit/zones.py": demo.ZONES})
    hrepo.git("add", "parcelkit/zones.py")
    hrepo.write({"parcelkit/rates.py": demo.RATES + "# unstaged edit\n", "scratch.txt": "untracked\n"})
    hrepo.git("write-tree")  # git commit refreshes the index's cache of trees itself; start from a fresh one
    before = snapshot(hrepo.path)
    message = machine("Add zone surcharges")
    blocked = commit(hrepo.path, message)
    assert blocked.returncode != 0
    assert "BLOCK" in blocked.stderr and "coverage.new-lines" in blocked.stderr
    assert snapshot(hrepo.path) == before
    saved = hrepo.path / ".git" / "verifier" / "last-message"
    assert f"git commit -F {saved}" in blocked.stderr
    # git's own cleanup of the message is the reference for what the saved file must hold.
    assert saved.read_text() == hrepo.git("stripspace", "--strip-comments", input=message.encode())

    # Fix the change (stage a tested module instead), then reuse the saved message: the commit passes
    # and gets its note.
    hrepo.git("rm", "-q", "--cached", "parcelkit/zones.py")
    hrepo.write({"parcelkit/volume.py": demo.VOLUME, "tests/test_volume.py": demo.TEST_VOLUME})
    hrepo.git("add", "parcelkit/volume.py", "tests/test_volume.py")
    passed = git(hrepo.path, "commit", "-q", "-F", str(saved))
    assert passed.returncode == 0, passed.stderr
    head = hrepo.head()
    assert hrepo.git("log", "-1", "--format=%B", head).strip() == message.strip()
    note = notes_of(hrepo.path)[head]
    assert note["verdict"] == "pass" and note["commit"] == head and note["agent"] == demo.AGENT
    assert {k: note["range"][k] for k in ("base", "head")} == {
        "base": hrepo.git("rev-parse", "HEAD~1").strip(),
        "head": head,
    }
    assert note["tests"]["run"] >= 1 and note["tests"]["failed"] == 0 and note["coverage"]["percent"] == 100.0


def test_commit_all_verifies_the_index_git_is_about_to_commit(hrepo: ScratchRepo) -> None:
    """`git commit -a` hands the hook a temporary index (GIT_INDEX_FILE); the real one is unchanged."""
    hrepo.write({"parcelkit/rates.py": demo.ROUNDING})  # breaks test_price_of_one_kilo
    blocked = commit(hrepo.path, machine("Simplify rounding"), "-a")
    assert blocked.returncode != 0
    assert "tests.failing" in blocked.stderr
    assert hrepo.git("log", "--format=%s").splitlines() == ["Start parcelkit"]


def test_unmarked_commits_are_fast_and_get_no_note(hrepo: ScratchRepo) -> None:
    assert commit(hrepo.path, "Human tweak", "--allow-empty").returncode == 0
    assert notes_of(hrepo.path) == {}


def test_a_bypass_needs_its_reason_which_is_printed_and_kept_in_the_note(hrepo: ScratchRepo) -> None:
    hrepo.write({"parcelkit/zones.py": demo.ZONES})
    hrepo.git("add", "-A")
    for empty in ("", "   "):
        refused = commit(hrepo.path, machine("Zones, in a hurry"), env={"VERIFIER_BYPASS": empty})
        assert refused.returncode != 0 and "VERIFIER_BYPASS is empty" in refused.stderr
    assert hrepo.git("log", "--format=%s").splitlines() == ["Start parcelkit"]
    reason = "release train leaves at noon; ticket OPS-12"
    bypassed = commit(hrepo.path, machine("Zones, in a hurry"), env={"VERIFIER_BYPASS": reason})
    assert bypassed.returncode == 0, bypassed.stderr
    assert f"bypassed by VERIFIER_BYPASS: {reason}" in bypassed.stderr and "unverified" in bypassed.stderr
    head = hrepo.head()
    entry = notes_of(hrepo.path)[head]
    assert (entry["how"], entry["skipped"], entry["verdict"]) == ("commit-hook", True, None)
    assert entry["reason"] == f"bypassed by VERIFIER_BYPASS: {reason}"


def test_the_old_skip_variable_is_refused_naming_the_new_one(hrepo: ScratchRepo) -> None:
    hrepo.write({"parcelkit/zones.py": demo.ZONES})
    hrepo.git("add", "-A")
    refused = commit(hrepo.path, machine("Zones, in a hurry"), env={"VERIFIER_SKIP": "1"})
    assert refused.returncode != 0
    assert "VERIFIER_SKIP was renamed VERIFIER_BYPASS" in refused.stderr and "Traceback" not in refused.stderr
    assert hrepo.git("log", "--format=%s").splitlines() == ["Start parcelkit"]  # nothing was committed
    assert notes_of(hrepo.path) == {}


def test_the_unmarked_path_does_not_import_the_pipeline(tmp_path: Path) -> None:
    message = tmp_path / "MSG"
    message.write_text("Fix a typo\n\nSigned-off-by: Ada Okafor <ada@quillfeather.example>\n")
    probe = (
        "import sys; from verifier.cli.main import main; code = main(['hook', 'commit-msg', sys.argv[1]]); "
        "print(code, sorted(m for m in sys.modules if m.startswith('verifier')))"
    )
    done = subprocess.run(
        [sys.executable, "-c", probe, str(message)],
        capture_output=True,
        text=True,
        env={**os.environ, "PYTHONPATH": str(ROOT)},
        cwd=tmp_path,
    )
    assert done.stdout.split(" ", 1)[0] == "0", done.stderr
    heavy = ("verifier.pipeline", "verifier.sandbox", "verifier.change.stage", "coverage", "pytest", "yaml", "docker")
    loaded = subprocess.run(
        [sys.executable, "-c", probe.replace("m.startswith('verifier')", "True"), str(message)],
        capture_output=True,
        text=True,
        env={**os.environ, "PYTHONPATH": str(ROOT)},
        cwd=tmp_path,
    ).stdout
    assert not [name for name in heavy if f"'{name}'" in loaded], loaded


def test_an_existing_hook_is_chained_and_uninstall_restores_it(tmp_path: Path) -> None:
    repo = ScratchRepo(tmp_path / "repo")
    repo.commit("Start parcelkit", BASE_FILES)
    hook = repo.path / ".git" / "hooks" / "commit-msg"
    hook.write_text(EXISTING_HOOK)
    hook.chmod(0o755)
    assert cli(repo.path, "hooks", "install").returncode == 0
    folder = repo.path / ".git" / "hooks"
    installed = {p.name: p.read_bytes() for p in folder.iterdir()}
    assert (folder / "commit-msg.verifier-chained").read_text() == EXISTING_HOOK

    again = cli(repo.path, "hooks", "install")  # installing twice changes nothing
    assert "already installed" in again.stdout
    assert {p.name: p.read_bytes() for p in folder.iterdir()} == installed

    assert commit(repo.path, "Human change", "--allow-empty").returncode == 0
    assert (repo.path / ".git" / "team-hook-ran").read_text() == "ran\n"
    refused = commit(repo.path, "REJECT this", "--allow-empty")
    assert refused.returncode != 0 and "team hook: no" in refused.stderr

    status = cli(repo.path, "hooks", "status").stdout
    assert "commit-msg   installed (runs the previous hook first)" in status
    assert cli(repo.path, "hooks", "uninstall").returncode == 0
    assert hook.read_text() == EXISTING_HOOK and os.access(hook, os.X_OK)
    assert sorted(p.name for p in folder.iterdir() if "verifier" in p.name or p.name in hooks.HOOK_NAMES) == [
        "commit-msg"
    ]


def test_core_hooks_path_is_honoured(tmp_path: Path) -> None:
    repo = ScratchRepo(tmp_path / "repo")
    repo.commit("Start parcelkit", BASE_FILES)
    repo.git("config", "core.hooksPath", "team-hooks")  # relative: git resolves it from the top folder
    assert cli(repo.path, "hooks", "install").returncode == 0
    assert (repo.path / "team-hooks" / "commit-msg").is_file()
    assert not (repo.path / ".git" / "hooks" / "commit-msg").exists()
    # A marked commit with no file changes has no machine-written lines: verified without a test run.
    assert commit(repo.path, machine("Empty, by the assistant"), "--allow-empty").returncode == 0
    assert notes_of(repo.path)[repo.head()]["verdict"] == "pass"


def test_a_linked_worktree_uses_the_shared_hooks(hrepo: ScratchRepo, tmp_path: Path) -> None:
    tree = tmp_path / "wt"
    hrepo.git("worktree", "add", "-q", "-b", "side", str(tree))
    # From the worktree, the effective hooks folder is the main repository's (git rev-parse --git-path hooks).
    assert hooks.hooks_dir(Git(tree)) == (hrepo.path / ".git" / "hooks").resolve()
    assert "installed" in cli(tree, "hooks", "status").stdout
    assert commit(tree, machine("Empty, by the assistant"), "--allow-empty").returncode == 0
    side = git(tree, "rev-parse", "HEAD").stdout.strip()
    assert notes_of(hrepo.path)[side]["verdict"] == "pass"
    refused = commit(tree, machine("REJECT: the assistant again") + "\nnot a trailer\n", "--allow-empty")
    assert refused.returncode == 0  # the trailer is not in the last paragraph: not marked, no note
    assert git(tree, "rev-parse", "HEAD").stdout.strip() not in notes_of(hrepo.path)


def test_a_missing_interpreter_blocks_marked_commits_with_a_clear_message(tmp_path: Path) -> None:
    repo = ScratchRepo(tmp_path / "repo")
    repo.commit("Start parcelkit", BASE_FILES)
    hooks.install(Git(repo.path), ["commit-msg"], python=str(tmp_path / "gone" / "python"))
    assert commit(repo.path, "Human change", "--allow-empty").returncode == 0
    blocked = commit(repo.path, machine("By the assistant"), "--allow-empty")
    assert blocked.returncode != 0 and "verifier hooks install" in blocked.stderr


# -- pre-push ----------------------------------------------------------------------------------------


def with_remote(repo: ScratchRepo, tmp_path: Path) -> Path:
    remote = tmp_path / "remote.git"
    subprocess.run(["git", "init", "-q", "--bare", str(remote)], check=True)
    repo.git("remote", "add", "origin", str(remote))
    assert git(repo.path, "push", "-q", "origin", "main").returncode == 0  # human history only: nothing to run
    return remote


def remote_head(remote: Path, branch: str) -> str:
    return subprocess.run(
        ["git", "rev-parse", "--verify", "-q", f"refs/heads/{branch}"], cwd=remote, capture_output=True, text=True
    ).stdout.strip()


def test_push_is_refused_when_a_pushed_machine_commit_fails_and_accepted_when_fixed(
    hrepo: ScratchRepo, tmp_path: Path
) -> None:
    remote = with_remote(hrepo, tmp_path)
    base = hrepo.head()
    hrepo.git("checkout", "-q", "-b", "feature")
    hrepo.write({"parcelkit/rates.py": demo.ROUNDING})
    hrepo.git("add", "-A")
    assert commit(hrepo.path, machine("Simplify rounding"), "--no-verify").returncode == 0  # the gate skipped
    refused = git(hrepo.path, "push", "-q", "origin", "feature")  # a new branch: all commits not on a remote
    assert refused.returncode != 0
    assert "tests.failing" in refused.stderr and "push is refused" in refused.stderr
    assert remote_head(remote, "feature") == ""
    old = git(hrepo.path, "push", "-q", "origin", "feature", env={"VERIFIER_SKIP": "1"})
    assert old.returncode != 0 and "VERIFIER_SKIP was renamed VERIFIER_BYPASS" in old.stderr
    empty = git(hrepo.path, "push", "-q", "origin", "feature", env={"VERIFIER_BYPASS": ""})
    assert empty.returncode != 0 and "needs its reason" in empty.stderr
    assert remote_head(remote, "feature") == ""

    hrepo.write(
        {"parcelkit/rates.py": demo.RATES, "parcelkit/volume.py": demo.VOLUME, "tests/test_volume.py": demo.TEST_VOLUME}
    )
    hrepo.git("add", "-A")
    assert commit(hrepo.path, machine("Restore rounding, add volume"), "--no-verify").returncode == 0
    accepted = git(hrepo.path, "push", "-q", "origin", "feature")
    assert accepted.returncode == 0, accepted.stderr
    assert remote_head(remote, "feature") == hrepo.head()
    # The range checked was the two new commits together; each got its note.
    notes = notes_of(hrepo.path)
    assert {sha: n["range"]["base"] for sha, n in notes.items()} == {
        hrepo.head(): base,
        hrepo.git("rev-parse", "HEAD~1").strip(): base,
    }
    assert notes[hrepo.head()]["verdict"] == "pass"

    deleted = git(hrepo.path, "push", "-q", "origin", ":feature")  # a deletion has nothing to verify
    assert deleted.returncode == 0, deleted.stderr
    assert remote_head(remote, "feature") == ""


def test_pushed_specs_follow_githooks_cases(tmp_path: Path) -> None:
    """The ranges for a fast-forward, a force push, a new branch, a deletion and a root commit."""
    repo = ScratchRepo(tmp_path / "repo")
    root = repo.commit("Root", {"a.txt": "1\n"})
    one = repo.commit("One", {"a.txt": "2\n"})
    two = repo.commit("Two", {"a.txt": "3\n"})
    g = Git(repo.path)
    zero = "0" * 40
    assert hooks.pushed_specs(g, two, one) == [f"{one}..{two}"]
    assert hooks.pushed_specs(g, zero, two) == []
    assert hooks.pushed_specs(g, two, two) == []
    repo.git("checkout", "-q", "-b", "rewrite", root)
    other = repo.commit("Other", {"a.txt": "other\n"})
    assert hooks.pushed_specs(g, other, two) == [f"{root}..{other}"]  # force push: from the merge-base
    # A new branch with no remote-tracking refs: everything is new, starting at the root commit.
    assert hooks.pushed_specs(g, two, zero) == [root, f"{root}..{two}"]
    repo.git("update-ref", "refs/remotes/origin/main", one)
    assert hooks.pushed_specs(g, two, zero) == [f"{one}..{two}"]
    assert json.dumps(hooks.pushed_specs(g, one, zero)) == "[]"


# -- the CI step in a shallow clone -------------------------------------------------------------------


def test_a_shallow_clone_is_deepened_until_the_merge_base_is_there(tmp_path: Path) -> None:
    upstream = ScratchRepo(tmp_path / "upstream")
    for number in range(6):
        upstream.commit(f"Main {number}", {"main.txt": f"{number}\n"})
    upstream.git("checkout", "-q", "-b", "feature")
    for number in range(4):
        upstream.commit(f"Feature {number}", {"feature.txt": f"{number}\n"})
    bare = tmp_path / "bare.git"
    subprocess.run(["git", "clone", "-q", "--bare", str(upstream.path), str(bare)], check=True)
    clone = tmp_path / "clone"
    # git clone --depth needs a transport that negotiates: file:// (git-clone(1), --depth).
    subprocess.run(
        ["git", "clone", "-q", "--depth", "1", "--branch", "feature", f"file://{bare}", str(clone)], check=True
    )
    subprocess.run(
        ["git", "fetch", "-q", "--depth", "1", "origin", "main:refs/remotes/origin/main"], cwd=clone, check=True
    )
    stuck = cli(clone, "check", "origin/main..HEAD", "--no-notes")
    assert stuck.returncode == 3 and "deepen" in stuck.stderr
    deepened = cli(clone, "check", "origin/main..HEAD", "--deepen", "2", "--no-notes", "--format", "json")
    assert deepened.returncode == 0, deepened.stderr
    report = json.loads(deepened.stdout[deepened.stdout.index("{") :])
    assert report["base"] == upstream.git("rev-parse", "main").strip()
    assert len(report["commits"]) == 4
