"""The gate end to end, on real repositories built with git in temp folders, with real pytest and coverage."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

from conftest import machine, run_check, snapshot, test_sandbox

from verifier.demo import scenario as demo
from verifier.demo.scratch import ScratchRepo

BASE_FILES = {
    "parcelkit/__init__.py": "",
    "parcelkit/rates.py": demo.RATES,
    "tests/test_rates.py": demo.TEST_RATES,
}


def start(repo: ScratchRepo, extra: dict[str, str] | None = None) -> str:
    return repo.commit("Start parcelkit", {**BASE_FILES, **(extra or {})})


def test_tested_machine_commit_passes(repo: ScratchRepo) -> None:
    start(repo, {"verifier.yaml": "version: 1\nselection:\n  run: all\n"})  # counts every test of the suite
    sha = repo.commit(
        machine("Add volumetric weight"), {"parcelkit/volume.py": demo.VOLUME, "tests/test_volume.py": demo.TEST_VOLUME}
    )
    out = run_check(repo, sha)
    assert out.code == 0, out.stderr + out.stdout
    report = out.report
    assert report["format"] == 3 and report["verdict"] == "pass"
    assert report["head"] == sha
    assert report["machine_lines"]["parcelkit/volume.py"] == list(range(1, 9))
    assert report["tests"]["run"] == 3 and report["tests"]["passed"] == 3
    # coverage.py counts 3 statements in VOLUME (DIVISOR =, def, return): docstrings are not statements.
    assert report["coverage"] == {**report["coverage"], "executable": 3, "covered": 3, "percent": 100.0}


def test_uncovered_lines_block_and_are_listed(repo: ScratchRepo) -> None:
    start(repo)
    sha = repo.commit(
        machine("Add zone surcharges"), {"parcelkit/zones.py": demo.ZONES, "tests/test_zones.py": demo.TEST_ZONES}
    )
    out = run_check(repo, sha)
    assert out.code == 1, out.stderr
    assert out.report["verdict"] == "block"
    assert out.report["coverage"]["uncovered"] == {"parcelkit/zones.py": [8, 9, 14]}
    assert any(f["rule"] == "coverage.new-lines" for f in out.report["findings"])
    assert "extra = 7.5" in out.stdout  # the terminal view shows the uncovered source


def test_executable_lines_agree_with_coverage_json(repo: ScratchRepo, tmp_path: Path) -> None:
    """Outside check: coverage.py's own `coverage json` report on the same tree gives the same counts."""
    start(repo)
    multiline = (
        '"""Multi-line statements count once."""\n\n\n'
        "def total(\n    a,\n    b,\n):\n    # a comment\n    return (\n        a\n        + b\n    )\n\n\n"
        "def unused():\n    return [\n        1,\n        2,\n    ]\n"
    )
    test = "from parcelkit.sums import total\n\n\ndef test_total():\n    assert total(1, 2) == 3\n"
    sha = repo.commit(machine("Add sums"), {"parcelkit/sums.py": multiline, "tests/test_sums.py": test})
    out = run_check(repo, sha)
    ours = out.report["coverage"]
    tree = tmp_path / "plain"
    repo.git("worktree", "add", "-q", "--detach", str(tree), sha)
    subprocess.run(
        [sys.executable, "-m", "coverage", "run", "--branch", "-m", "pytest", "-q", "-p", "no:cacheprovider"],
        cwd=tree,
        check=True,
        capture_output=True,
    )
    subprocess.run([sys.executable, "-m", "coverage", "json", "-q", "-o", "cov.json"], cwd=tree, check=True)
    theirs = json.loads((tree / "cov.json").read_text())["files"]["parcelkit/sums.py"]["summary"]
    assert ours["executable"] == theirs["num_statements"]
    assert ours["covered"] == theirs["covered_lines"]
    assert out.code == 1  # `unused` is never called: 4 of 6 statements = 66.7% < 90%


def test_breaking_an_existing_test_blocks_with_its_node_id(repo: ScratchRepo) -> None:
    start(repo)
    sha = repo.commit(machine("Simplify rounding"), {"parcelkit/rates.py": demo.ROUNDING})
    out = run_check(repo, sha)
    assert out.code == 1
    assert out.report["tests"]["failed_ids"] == ["tests/test_rates.py::test_price_of_one_kilo"]
    assert {f["rule"] for f in out.report["findings"]} == {"tests.failing"}


def test_human_commit_needs_no_run(repo: ScratchRepo) -> None:
    start(repo)
    sha = repo.commit("Human tweak", {"parcelkit/rates.py": demo.ROUNDING})
    out = run_check(repo, sha)
    assert out.code == 0
    assert out.report["machine_lines"] == {} and out.report["sandbox"] is None


def test_a_later_human_edit_makes_the_line_human(repo: ScratchRepo) -> None:
    base = start(repo)
    repo.commit(machine("Add volume"), {"parcelkit/volume.py": demo.VOLUME, "tests/test_volume.py": demo.TEST_VOLUME})
    edited = demo.VOLUME.replace("DIVISOR = 5000", "DIVISOR = 6000  # new carrier rules")
    human_tests = demo.TEST_VOLUME.replace("1.2", "1.0").replace("1.52", "1.27").replace("200.0", "166.67")
    repo.commit(
        "Human: new divisor",
        {"parcelkit/volume.py": edited, "tests/test_volume.py": human_tests},
    )
    out = run_check(repo, f"{base}..HEAD")
    lines = out.report["machine_lines"]["parcelkit/volume.py"]
    assert 3 not in lines and lines == [1, 2, 4, 5, 6, 7, 8]
    # `git blame` itself is the outside reference for who introduced each line.
    blame = repo.git("blame", "--porcelain", "-L3,3", "HEAD", "--", "parcelkit/volume.py").split()[0]
    assert blame == repo.head()
    assert out.code == 0


def test_scope_trailer_limits_machine_lines(repo: ScratchRepo) -> None:
    start(repo)
    sha = repo.commit(
        machine("Volume, tests by a human", scope="parcelkit/"),
        {"parcelkit/volume.py": demo.VOLUME, "tests/test_volume.py": demo.TEST_VOLUME},
    )
    out = run_check(repo, sha)
    assert set(out.report["machine_lines"]) == {"parcelkit/volume.py"}


def test_merge_commit_inside_the_range(repo: ScratchRepo) -> None:
    base = start(repo)
    repo.git("checkout", "-q", "-b", "feature")
    repo.commit(machine("Add volume"), {"parcelkit/volume.py": demo.VOLUME, "tests/test_volume.py": demo.TEST_VOLUME})
    repo.git("checkout", "-q", "main")
    repo.commit("Human docs", {"README.md": "# parcelkit\n"})
    repo.git("merge", "-q", "--no-ff", "-m", "Merge feature", "feature")
    out = run_check(repo, f"{base}..main")
    assert out.code == 0, out.stderr
    assert set(out.report["machine_lines"]) == {"parcelkit/volume.py", "tests/test_volume.py"}
    assert "README.md" not in out.report["machine_lines"]
    assert len(out.report["commits"]) == 3


def test_staged_change_with_trailer_is_verified_and_nothing_changes(repo: ScratchRepo, tmp_path: Path) -> None:
    start(repo)
    repo.write({"parcelkit/zones.py": demo.ZONES, "tests/test_zones.py": demo.TEST_ZONES})
    repo.git("add", "parcelkit/zones.py")
    repo.write({"untracked.txt": "keep me\n"})
    message = tmp_path / "MSG"
    message.write_text(machine("Add zones"))
    before = snapshot(repo.path)
    out = run_check(repo, "--staged", "--message-file", str(message))
    assert snapshot(repo.path) == before
    assert out.report["head"] == "index"
    # Only zones.py is staged, so the test file is not in the change and the code is never executed.
    assert out.report["machine_lines"] == {"parcelkit/zones.py": list(range(1, 15))}
    assert out.code == 1 and out.report["tests"]["failed"] == 0


def test_staged_in_a_repository_with_no_commit(repo: ScratchRepo, tmp_path: Path) -> None:
    repo.write({**BASE_FILES})
    repo.git("add", "-A")
    message = tmp_path / "MSG"
    message.write_text(machine("First commit by the assistant"))
    out = run_check(repo, "--staged", "--message-file", str(message))
    assert out.report["base"] is None
    assert out.code == 0, out.stdout + out.stderr
    assert out.report["tests"]["passed"] == 2


def test_staged_without_trailer_returns_at_once(repo: ScratchRepo, tmp_path: Path) -> None:
    message = tmp_path / "MSG"
    message.write_text("Human commit\n\nSigned-off-by: Ada Okafor <ada@quillfeather.example>\n")
    out = run_check(repo, "--staged", "--message-file", str(message))
    assert out.code == 0 and "nothing to verify" in out.stdout


def test_policy_comes_from_the_base_not_the_change(repo: ScratchRepo) -> None:
    base = start(repo, {"verifier.yaml": "version: 1\ncoverage:\n  threshold: 70\n"})
    repo.commit("Human: relax the policy", {"verifier.yaml": "version: 1\ncoverage:\n  threshold: 0\n"})
    repo.commit(machine("Zones"), {"parcelkit/zones.py": demo.ZONES, "tests/test_zones.py": demo.TEST_ZONES})
    out = run_check(repo, f"{base}..HEAD")
    assert out.report["policy"] == f"{base[:12]}:verifier.yaml"
    assert out.report["coverage"]["threshold"] == 70.0
    # 6 of 9 = 66.7% fails the base's 70%; the 0% the change itself brings plays no part
    blocking = {f["rule"] for f in out.report["findings"] if f["severity"] == "block"}
    assert out.code == 1 and blocking == {"coverage.new-lines"}
    strict = repo.commit("Human: strict", {"verifier.yaml": "version: 1\nbuilds_on: strict\n"})
    sha = repo.commit(machine("More zones"), {"parcelkit/zones.py": demo.ZONES + "\n\ndef z():\n    return 1\n"})
    out = run_check(repo, f"{strict}..{sha}")
    assert out.report["coverage"]["threshold"] == 100.0 and out.code == 1


def test_a_machine_edit_of_the_policy_is_blocked(repo: ScratchRepo) -> None:
    start(repo, {"verifier.yaml": "version: 1\ncoverage:\n  threshold: 50\n"})
    sha = repo.commit(machine("Relax the policy"), {"verifier.yaml": "version: 1\ncoverage:\n  threshold: 0\n"})
    out = run_check(repo, sha)
    assert out.code == 1
    assert [f["path"] for f in out.report["findings"] if f["rule"] == "paths.protected"] == ["verifier.yaml"]


def test_broken_policy_is_exit_2_naming_file_line_and_key(repo: ScratchRepo) -> None:
    start(repo, {"verifier.yaml": "version: 1\ncoverage:\n  treshold: 80\n"})
    sha = repo.commit(machine("Zones"), {"parcelkit/zones.py": demo.ZONES})
    out = run_check(repo, sha)
    assert out.code == 2
    assert ":verifier.yaml:3: key 'coverage.treshold': unknown key" in out.stderr
    assert "Traceback" not in out.stderr
    assert out.report["verdict"] == "error"


def test_syntax_error_in_machine_code_is_reported_as_such(repo: ScratchRepo) -> None:
    start(repo)
    sha = repo.commit(machine("Broken"), {"parcelkit/rates.py": demo.RATES + "\ndef oops(:\n    pass\n"})
    out = run_check(repo, sha)
    assert out.code == 1
    syntax = [f for f in out.report["findings"] if f["rule"] == "code.syntax"]
    # RATES is 11 lines, then a blank one: the broken def is line 13
    assert syntax and syntax[0]["path"] == "parcelkit/rates.py" and syntax[0]["line"] == 13
    assert out.report["tests"]["passed"] == 0  # the tests could not import the module: nothing passed


def test_collection_error_is_not_a_pass(repo: ScratchRepo) -> None:
    start(repo)
    sha = repo.commit(
        machine("Bad test import"),
        {"parcelkit/extra.py": "X = 1\n", "tests/test_extra.py": "import parcelkit.missing\n"},
    )
    out = run_check(repo, sha)
    assert out.code == 3
    assert out.report["verdict"] == "error"
    assert any("collection error" in f["message"] for f in out.report["findings"])


def test_timeout_is_exit_3(repo: ScratchRepo) -> None:
    start(repo, {"verifier.yaml": "version: 1\nlimits:\n  wall_seconds: 5\n"})
    sha = repo.commit(
        machine("Slow"),
        {
            "parcelkit/slow.py": "def wait():\n    while True:\n        pass\n",
            "tests/test_slow.py": "from parcelkit.slow import wait\n\n\ndef test_wait():\n    assert wait() is None\n",
        },
    )
    out = run_check(repo, sha)
    assert out.code == 3
    assert out.report["run"]["status"] == "timeout"


def test_detached_head_and_default_spec(repo: ScratchRepo) -> None:
    start(repo)
    sha = repo.commit(machine("Volume"), {"parcelkit/volume.py": demo.VOLUME, "tests/test_volume.py": demo.TEST_VOLUME})
    repo.git("checkout", "-q", "--detach", sha)
    out = run_check(repo)  # no upstream: HEAD alone
    assert out.code == 0 and out.report["head"] == sha


def test_upstream_range_is_the_default(repo: ScratchRepo, tmp_path: Path) -> None:
    start(repo)
    clone = ScratchRepo(tmp_path / "clone", init=False)
    subprocess.run(["git", "clone", "-q", str(repo.path), str(clone.path)], check=True)
    clone.commit(machine("Volume"), {"parcelkit/volume.py": demo.VOLUME, "tests/test_volume.py": demo.TEST_VOLUME})
    clone.commit(machine("Zones"), {"parcelkit/zones.py": demo.ZONES, "tests/test_zones.py": demo.TEST_ZONES})
    out = run_check(clone)
    assert out.report["spec"] == "@{upstream}..HEAD" and len(out.report["commits"]) == 2
    assert out.code == 1  # the zones commit leaves lines uncovered


def test_shallow_clone(repo: ScratchRepo, tmp_path: Path) -> None:
    start(repo)
    repo.commit("Human", {"README.md": "x\n"})
    repo.commit(machine("Volume"), {"parcelkit/volume.py": demo.VOLUME, "tests/test_volume.py": demo.TEST_VOLUME})
    shallow = tmp_path / "shallow"
    subprocess.run(["git", "clone", "-q", "--depth", "1", f"file://{repo.path}", str(shallow)], check=True)
    out = run_check(shallow, "HEAD")
    assert out.code == 3 and "shallow" in out.stderr and "fetch" in out.stderr
    subprocess.run(["git", "fetch", "-q", "--deepen=1"], cwd=shallow, check=True)
    assert run_check(shallow, "HEAD").code == 0


def test_renames_deletions_and_binary_files(repo: ScratchRepo) -> None:
    start(repo, {"parcelkit/old_volume.py": demo.VOLUME, "docs/logo.png": b"\x89PNG\r\n\x1a\n\x00\x01\x02"})
    repo.git("mv", "parcelkit/old_volume.py", "parcelkit/volume.py")
    sha = repo.commit(
        machine("Rename volume, drop the logo, add a binary"),
        {
            "tests/test_volume.py": demo.TEST_VOLUME,
            "data/table.bin": bytes(range(256)),
        },
        remove=("docs/logo.png",),
    )
    out = run_check(repo, sha)
    assert out.code == 0, out.stderr
    assert set(out.report["machine_lines"]) == {"tests/test_volume.py"}  # a pure rename adds no line


def test_bad_revision_is_a_clear_usage_error(repo: ScratchRepo) -> None:
    start(repo)
    out = run_check(repo, "no-such-branch")
    assert out.code == 2 and "'no-such-branch' is not a commit" in out.stderr and "Traceback" not in out.stderr


def test_unavailable_sandbox_is_exit_3(repo: ScratchRepo) -> None:
    start(repo)
    sha = repo.commit(machine("Volume"), {"parcelkit/volume.py": demo.VOLUME, "tests/test_volume.py": demo.TEST_VOLUME})
    out = run_check(repo, sha, sandbox="docker", env={"DOCKER_HOST": "unix:///nonexistent/docker.sock"})
    assert out.code == 3 and "docker" in out.stderr


def test_a_credential_is_never_quoted_in_any_report(repo: ScratchRepo, tmp_path: Path) -> None:
    start(repo)
    secret = "AKIA" + "Q7XW3MZP5RT2KV8N"  # the shape of an AWS access key id, made up here
    sha = repo.commit(machine("Carrier client"), {"parcelkit/carrier.py": f'def client():\n    return "{secret}"\n'})
    out_dir = tmp_path / "reports"
    done = subprocess.run(
        [
            sys.executable,
            "-m",
            "verifier",
            "-C",
            str(repo.path),
            "check",
            sha,
            "--sandbox",
            test_sandbox(),
            "--format",
            "all",
            "--output",
            str(out_dir),
        ],
        capture_output=True,
        text=True,
    )
    assert done.returncode == 1
    assert "secrets.literal" in done.stdout
    assert secret not in done.stdout + done.stderr
    written = {path.name: path.read_text() for path in out_dir.iterdir()}
    assert written and all(secret not in text for text in written.values())
    notes = repo.git("notes", "--ref=refs/notes/verifier", "show", sha)
    assert "secrets.literal" in notes and secret not in notes


def test_a_missing_folder_is_a_usage_error(tmp_path: Path) -> None:
    done = subprocess.run(
        [sys.executable, "-m", "verifier", "-C", str(tmp_path / "nowhere"), "check"], capture_output=True, text=True
    )
    assert done.returncode == 2 and "is not a folder" in done.stderr and "Traceback" not in done.stderr
