"""Tests of the process sandbox (no isolation): collection, output cap, timeout kill, environment scrubbing.

Real child processes; afterwards the host's /proc must hold no process carrying the run's marker, and the
private temp folder the backend used must be empty again.
"""

from __future__ import annotations

import json
import os
import tempfile
import textwrap
import uuid
from collections.abc import Callable
from pathlib import Path

import pytest
from conftest import processes_carrying

from verifier.errors import UsageError
from verifier.models import Limits, SandboxRequest, SandboxResult
from verifier.sandbox.process import ProcessBackend

Runner = Callable[..., SandboxResult]


@pytest.fixture
def run(tree: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Runner:
    """Run Python code in the process sandbox; then check that nothing of it is left."""
    private_temp = tmp_path / "temp"
    private_temp.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(private_temp))

    def run_code(
        code: str, collect: tuple[str, ...] = (), env: dict[str, str] | None = None, **limits: float
    ) -> SandboxResult:
        marker = f"verifier-test-{uuid.uuid4().hex}"
        request = SandboxRequest(
            tree=str(tree),
            python_args=("-c", f"# {marker}\n{textwrap.dedent(code)}"),
            env={"MARKER": marker, **(env or {})},
            limits=Limits(**{"wall_seconds": 30, **limits}),
            collect=collect,
        )
        result = ProcessBackend().run(request)
        assert processes_carrying(marker) == []
        assert os.listdir(private_temp) == []
        return result

    return run_code


def test_it_says_it_isolates_nothing() -> None:
    assert ProcessBackend().isolation.startswith("none")
    assert ProcessBackend().problem() is None


def test_written_files_come_back_and_symlinks_are_not_followed(run: Runner, tree: Path, tmp_path: Path) -> None:
    outside = tmp_path / "outside.txt"
    outside.write_text("not yours")
    (tree / "leak").symlink_to(outside)
    result = run(
        """
        import os
        os.makedirs("out")
        open("out/result.txt", "w").write(open("given.txt").read().upper())
        os.symlink("../given.txt", "out/link.txt")
    """,
        collect=("out/result.txt", "out/link.txt", "leak", "missing.txt", "../tree/given.txt"),
    )
    assert result.exit_status == 0, result.output
    assert result.files == {"out/result.txt": b"FROM THE TREE\n"}
    assert sorted(os.listdir(tree)) == ["given.txt", "leak"]  # the tree itself is never written


def test_output_is_capped_keeping_head_and_tail(run: Runner) -> None:
    result = run(
        """
        print("first line")
        for number in range(200_000):
            print("filler", number)
        print("last line")
    """,
        output_bytes=4_000,
    )
    assert result.exit_status == 0
    assert result.output_truncated and result.limit_hit == "output"
    assert result.output.startswith("first line") and result.output.rstrip().endswith("last line")
    assert "bytes of output dropped" in result.output and len(result.output) < 4_200


def test_a_timeout_kills_the_whole_process_group(run: Runner) -> None:
    result = run(
        """
        import subprocess, sys, time
        sleeper = "import time; time.sleep(300)"
        code = f"import subprocess, sys, time; subprocess.Popen([sys.executable, '-c', {sleeper!r}]); time.sleep(300)"
        subprocess.Popen([sys.executable, "-c", code])  # a child with a grandchild, both inheriting MARKER
        print("started", flush=True)
        time.sleep(300)
    """,
        wall_seconds=3,
    )
    assert result.timed_out and result.limit_hit == "wall" and result.exit_status is None
    assert "started" in result.output  # the fixture then checks that no process with the marker is left


def test_processes_left_behind_are_killed_when_the_command_ends(run: Runner) -> None:
    result = run("""
        import subprocess, sys
        subprocess.Popen([sys.executable, "-c", "import time; time.sleep(300)"])
    """)
    assert result.exit_status == 0 and not result.timed_out


def test_only_the_given_environment_reaches_the_command(run: Runner, monkeypatch: pytest.MonkeyPatch) -> None:
    secret = f"secret-{uuid.uuid4().hex}"
    monkeypatch.setenv("VERIFIER_TEST_SECRET", secret)
    result = run("import json, os; print(json.dumps(dict(os.environ)))", env={"KEPT": "yes"})
    seen = json.loads(result.output)
    # LC_CTYPE: Python sets it itself when it coerces the C locale (PEP 538).
    assert set(seen) - {"LC_CTYPE"} == {"MARKER", "KEPT", "HOME", "TMPDIR", "PATH"}
    assert secret not in result.output
    assert seen["HOME"] != os.environ["HOME"] and seen["PATH"].endswith(":/usr/bin:/bin")


def test_a_missing_tree_is_a_clear_error(tmp_path: Path) -> None:
    request = SandboxRequest(
        tree=str(tmp_path / "nowhere"), python_args=("-c", "pass"), env={}, limits=Limits(), collect=()
    )
    with pytest.raises(UsageError, match="is not a folder"):
        ProcessBackend().run(request)


def test_every_registered_backend_provides_the_whole_interface() -> None:
    """Each backend has every member the Backend protocol declares, so no caller needs to test a name."""
    from verifier.sandbox import BACKENDS, Backend, load

    declared = {name for name in vars(Backend) if not name.startswith("_")}
    assert {"name", "isolation", "problem", "for_repository", "environment", "facts", "run"} <= declared
    for name in BACKENDS:
        backend = load(name)
        missing = {member for member in declared if not hasattr(backend, member)}
        assert missing == set(), f"{name} lacks {missing}"
        assert backend.name == name
        assert isinstance(backend.environment(), str)
        assert all(isinstance(key, str) and isinstance(value, str) for key, value in backend.facts())


def test_the_doctor_lists_every_backend_with_its_facts(capsys: pytest.CaptureFixture[str]) -> None:
    from verifier.sandbox.doctor import doctor

    code = doctor()
    shown = capsys.readouterr().out
    assert code == 0  # the process backend works on any Linux
    for name in ("docker", "namespace", "process"):
        assert any(line.startswith(name) for line in shown.splitlines()), shown
    assert "runs as: uid" in shown
