"""paths.protected on real commits: machine edits, deletions and renames of protected files; human edits."""

from __future__ import annotations

from conftest import machine
from test_rules_support import context_for, findings, machine_change

from verifier.demo.scratch import ScratchRepo

CI = "name: ci\non: [push]\njobs:\n  test:\n    runs-on: ubuntu-latest\n"


def test_machine_edit_of_a_workflow_is_reported(repo: ScratchRepo) -> None:
    context = machine_change(
        repo, {".github/workflows/ci.yml": CI}, {".github/workflows/ci.yml": CI + "    continue-on-error: true\n"}
    )
    found = findings("paths.protected", context)
    assert [(f.path, f.line) for f in found] == [(".github/workflows/ci.yml", 6)]


def test_human_edit_of_a_workflow_is_not(repo: ScratchRepo) -> None:
    context = machine_change(
        repo,
        {".github/workflows/ci.yml": CI, "a.py": ""},
        {".github/workflows/ci.yml": CI + "    timeout-minutes: 5\n"},
        human=True,
    )
    assert findings("paths.protected", context) == []


def test_machine_deletion_counts_though_it_adds_no_line(repo: ScratchRepo) -> None:
    context = machine_change(
        repo,
        {"Dockerfile": "FROM python:3.11\n", "deploy/app.yaml": "replicas: 2\n"},
        {"deploy/app.yaml": ""},
        remove=("Dockerfile",),
    )
    found = {f.path: f.message for f in findings("paths.protected", context)}
    assert found == {
        "Dockerfile": "protected file deleted by a machine commit",
        "deploy/app.yaml": "protected file edited by a machine commit",
    }


def test_rename_into_migrations(repo: ScratchRepo) -> None:
    body = "def upgrade():\n    pass\n" * 10
    repo.commit("Base", {"parcelkit/draft_0002.py": body})
    (repo.path / "parcelkit/migrations").mkdir()
    repo.git("mv", "parcelkit/draft_0002.py", "parcelkit/migrations/0002_rates.py")
    sha = repo.commit(machine("Move the migration into place"))
    found = findings("paths.protected", context_for(repo, sha))
    assert [(f.path, f.details.get("status")) for f in found] == [("parcelkit/migrations/0002_rates.py", "renamed")]


def test_policy_and_lock_files_are_protected_by_default(repo: ScratchRepo) -> None:
    context = machine_change(
        repo,
        {"README.md": "x\n"},
        {"verifier.yaml": "version: 1\n", "poetry.lock": "# lock\n", "parcelkit/app.py": "x = 1\n"},
    )
    assert sorted(f.path for f in findings("paths.protected", context)) == ["poetry.lock", "verifier.yaml"]


def test_teams_extend_the_list(repo: ScratchRepo) -> None:
    context = machine_change(
        repo,
        None,
        {"ops/billing.sh": "echo\n", "parcelkit/app.py": "x = 1\n"},
        options={"paths.protected": {"extra": ["ops/**"]}},
    )
    assert [f.path for f in findings("paths.protected", context)] == ["ops/billing.sh"]


def test_scope_trailer_outside_the_protected_file(repo: ScratchRepo) -> None:
    """A machine commit scoped to parcelkit/ leaves its edit of the workflow to the human who committed it."""
    repo.commit("Base", {".github/workflows/ci.yml": CI})
    sha = repo.commit(
        machine("Tune rates", scope="parcelkit/"),
        {".github/workflows/ci.yml": CI + "    timeout-minutes: 5\n", "parcelkit/rates.py": "R = 1\n"},
    )
    assert findings("paths.protected", context_for(repo, sha)) == []


def test_combined_glob_matcher_agrees_with_the_scope_matcher() -> None:
    """The one-regex matcher of a glob list must say what the scope trailer's matcher says, glob by glob."""
    from verifier.provenance.trailers import path_in_scope
    from verifier.rules.machine import matches
    from verifier.rules.paths import DEFAULT_PROTECTED

    globs = [*DEFAULT_PROTECTED, "docs/", "src/*/", "parcelkit", "*.md", "a?c/**/z.py", "[ab]*.txt"]
    paths = [
        "Dockerfile",
        "svc/Dockerfile",
        "svc/Dockerfile.dev",
        ".github/workflows/ci.yml",
        ".github/x.yml",
        "docs/a.md",
        "docs",
        "src/pk/x.py",
        "src/x.py",
        "parcelkit/rates.py",
        "parcelkitten/x.py",
        "README.md",
        "sub/README.md",
        "abc/z.py",
        "abc/q/r/z.py",
        "a.txt",
        "c.txt",
        "x/migrations/0001.py",
        "infra/main.tf",
        "verifier.yaml",
        "sub/verifier.yaml",
        "poetry.lock",
        "deep/poetry.lock",
        "hooks",
        "hooks/pre-commit",
    ]
    for glob in globs:
        for path in paths:
            assert matches(path, [glob]) == path_in_scope(path, (glob,)), (glob, path)
    for path in paths:
        assert matches(path, globs) == any(path_in_scope(path, (glob,)) for glob in globs), path
