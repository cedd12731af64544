"""Shared fixtures: scratch repositories made with real git, the CLI run as a real subprocess."""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

import pytest

from verifier.demo.scratch import ScratchRepo

ROOT = Path(__file__).resolve().parent.parent
AGENT = "quill-assist/2.3"


def machine(title: str, agent: str = AGENT, scope: str | None = None) -> str:
    """A commit message carrying the Model-Written trailer (and optionally a scope)."""
    trailers = f"Model-Written: {agent}\n" + (f"Model-Written-Scope: {scope}\n" if scope else "")
    return f"{title}\n\nWritten by the assistant.\n\n{trailers}"


@dataclass
class Outcome:
    code: int
    stdout: str
    stderr: str
    report: dict | None


def test_sandbox() -> str:
    """The sandbox the end-to-end tests use: namespace where it works (CI requires it), else process."""
    from verifier.sandbox.namespace import NamespaceBackend

    problem = NamespaceBackend().problem()
    if problem is None:
        return "namespace"
    if os.environ.get("VERIFIER_REQUIRE_NAMESPACE") == "1":
        pytest.fail(f"the namespace sandbox is required here but does not work: {problem}")
    return "process"


test_sandbox.__test__ = False  # type: ignore[attr-defined]  # a helper, not a test


def run_check(
    repo: ScratchRepo | Path, *args: str, sandbox: str | None = None, env: dict | None = None, timeout: float = 300
) -> Outcome:
    """Run ``verifier check`` as a real process with a JSON report; return code, output and report."""
    path = repo.path if isinstance(repo, ScratchRepo) else repo
    report_file = path.parent / f"report-{os.getpid()}-{hashlib.sha1(str(args).encode()).hexdigest()[:8]}.json"
    command = [
        sys.executable,
        "-m",
        "verifier",
        "-C",
        str(path),
        "check",
        *args,
        "--sandbox",
        sandbox or test_sandbox(),
        "--format",
        "json",
        "--output",
        str(report_file),
    ]
    done = subprocess.run(
        command,
        capture_output=True,
        text=True,
        timeout=timeout,
        env={**os.environ, "PYTHONPATH": str(ROOT), **(env or {})},
    )
    report = json.loads(report_file.read_text()) if report_file.exists() else None
    report_file.unlink(missing_ok=True)
    return Outcome(done.returncode, done.stdout, done.stderr, report)


@pytest.fixture
def repo(tmp_path: Path) -> ScratchRepo:
    return ScratchRepo(tmp_path / "repo")


@pytest.fixture
def tree(tmp_path: Path) -> Path:
    """A small materialised tree for the sandbox backends' tests."""
    folder = tmp_path / "tree"
    folder.mkdir()
    (folder / "given.txt").write_text("from the tree\n")
    return folder


def snapshot(path: Path) -> dict[str, str]:
    """Everything a run must leave byte-identical: HEAD, refs, index, stash, working tree, untracked files."""

    def git(*args: str) -> str:
        return subprocess.run(["git", *args], cwd=path, capture_output=True, text=True).stdout

    state = {
        "HEAD": git("rev-parse", "HEAD") + git("symbolic-ref", "-q", "HEAD"),
        # the gate's own notes ref is the one ref a check may write (verifier.report.notes)
        "refs": "".join(
            line
            for line in git("for-each-ref", "--format=%(refname) %(objectname)").splitlines(keepends=True)
            if not line.startswith("refs/notes/verifier ")
        ),
        "stash": git("stash", "list"),
        "status": git("status", "--porcelain=v2", "--untracked-files=all", "--ignored"),
    }
    index = path / ".git" / "index"
    state["index"] = hashlib.sha256(index.read_bytes()).hexdigest() if index.exists() else "none"
    for file in sorted(path.rglob("*")):
        if ".git" in file.relative_to(path).parts or not file.is_file():
            continue
        state[str(file.relative_to(path))] = hashlib.sha256(file.read_bytes()).hexdigest()
    return state


def processes_carrying(marker: str) -> list[int]:
    """Host processes (any PID namespace) whose command line or environment holds ``marker``."""
    found = []
    for name in os.listdir("/proc"):
        if not name.isdigit() or int(name) == os.getpid():
            continue
        for part in ("cmdline", "environ"):
            try:
                if marker.encode() in Path(f"/proc/{name}/{part}").read_bytes():
                    found.append(int(name))
                    break
            except OSError:
                continue
    return found


def run_audit_cli(repo: ScratchRepo | Path, *args: str, env: dict | None = None) -> subprocess.CompletedProcess[str]:
    """Run ``verifier audit`` as a real process on the checkout's code, with only the system PATH beside it
    (``env`` adds to or overrides that); return the finished process with its text output."""
    path = repo.path if isinstance(repo, ScratchRepo) else repo
    return subprocess.run(
        [sys.executable, "-m", "verifier", "-C", str(path), "audit", *args],
        capture_output=True,
        text=True,
        env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin", **(env or {})},
        check=False,
    )


def run_in_parts(repo: ScratchRepo, spec: str, folder: Path, parts: int = 2) -> tuple[int, dict, list[Outcome]]:
    """``verifier check SPEC --part K/N`` for every K (real processes, JSON reports in ``folder``), then
    ``verifier join`` of those reports; return join's exit code, its JSON report and each part's outcome."""
    outcomes, files = [], []
    for k in range(1, parts + 1):
        part = run_check(repo, spec, "--part", f"{k}/{parts}")
        assert part.report is not None, part.stderr
        outcomes.append(part)
        files.append(folder / f"part-{k}.json")
        files[-1].write_text(json.dumps(part.report))
    joined = folder / "joined.json"
    command = [sys.executable, "-m", "verifier", "-C", str(repo.path), "join", *map(str, files)]
    done = subprocess.run(
        [*command, "--format", "json", "--output", str(joined)],
        capture_output=True,
        text=True,
        env={**os.environ, "PYTHONPATH": str(ROOT)},
    )
    assert joined.exists(), done.stderr
    return done.returncode, json.loads(joined.read_text()), outcomes


def report_of(outcome: Outcome) -> dict:
    """The JSON report of a check, which must have written one."""
    assert outcome.report is not None, outcome.stdout + outcome.stderr
    return outcome.report


def ran(outcome: Outcome) -> set[str]:
    """The node ids of the tests a check ran at head."""
    return {test["node_id"] for test in report_of(outcome)["tests"]["outcomes"]}


def failed(outcome: Outcome) -> set[str]:
    """The node ids of the tests that failed (or errored) in a check's run at head."""
    return {t["node_id"] for t in report_of(outcome)["tests"]["outcomes"] if t["outcome"] in ("failed", "error")}
