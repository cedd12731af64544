"""The README's commands, exactly, on a fresh virtual environment: the first-hour path a new user takes.

A copy of the checkout (the files git tracks) gets ``python3 -m venv .venv && .venv/bin/pip install .``
and the demo, as the README's first command says; then every command line the README documents runs
once against the demo repository with the installed ``verifier`` (not this checkout's code). None may end
in a usage error (exit 2) or a traceback, and each verdict is the one the demo's history calls for. The
package index is the only network it needs (CI allows the package registries); pip's cache keeps it quick.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
pytestmark = pytest.mark.slow


def readme_commands() -> list[str]:
    """Every ``verifier ...`` line in the README's code blocks, without its comment."""
    blocks = re.findall(r"```\n(.*?)```", (ROOT / "README.md").read_text(), re.S)
    lines = [line.split("  #", 1)[0].strip() for block in blocks for line in block.splitlines()]
    return [line for line in lines if line.startswith("verifier ")]


def shape(command: str) -> str:
    """The subcommand and the options a line uses: what this test must run once."""
    words = command.split()
    options = sorted({w.split("=", 1)[0] for w in words if w.startswith("--")})
    action = words[2:3] if words[1] in ("policy", "sandbox", "hooks") else []
    if words[1] == "rules" and len(words) > 2:
        action = ["<rule id>"]
    return " ".join([words[1], *action, *options])


@pytest.fixture(scope="module")
def installed(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path, subprocess.CompletedProcess[str]]:
    """The copy of the checkout with its fresh .venv, and the demo repository the README's command built."""
    if shutil.which("python3") is None:
        pytest.skip("no python3 on PATH")
    work = tmp_path_factory.mktemp("fresh")
    copy = work / "verifier"
    tracked = subprocess.run(["git", "ls-files", "-z"], cwd=ROOT, capture_output=True, check=True).stdout
    for name in filter(None, tracked.decode().split("\0")):
        if (ROOT / name).is_file():
            (copy / name).parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(ROOT / name, copy / name)
    demo = work / "demo"
    first = next(b for b in re.findall(r"```\n(.*?)```", (ROOT / "README.md").read_text(), re.S) if "venv" in b)
    command = first.strip() + f" {demo}"  # the README's line, with the demo's folder named
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "VIRTUAL_ENV")}
    done = subprocess.run(["bash", "-c", command], cwd=copy, capture_output=True, text=True, env=env, timeout=900)
    return copy, demo, done


def test_the_readmes_first_command_installs_and_runs_the_demo(installed: tuple) -> None:
    copy, demo, done = installed
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-3000:]
    assert "demo: every verdict is as expected" in done.stdout
    assert (copy / ".venv" / "bin" / "verifier").exists() and (demo / ".git").is_dir()


def test_every_documented_command_works_after_that_install(installed: tuple, tmp_path: Path) -> None:
    copy, demo, done = installed
    assert done.returncode == 0, done.stderr[-3000:]
    tool = str(copy / ".venv" / "bin" / "verifier")
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "VIRTUAL_ENV")}

    def git(*args: str) -> str:
        return subprocess.run(["git", *args], cwd=demo, capture_output=True, text=True, check=True).stdout.strip()

    def run(*args: str, expect: set[int]) -> subprocess.CompletedProcess[str]:
        out = subprocess.run([tool, *args], cwd=demo, capture_output=True, text=True, env=env, timeout=600)
        shown = f"verifier {' '.join(args)} -> {out.returncode}\n{out.stdout[-2000:]}\n{out.stderr[-2000:]}"
        assert out.returncode in expect and "Traceback" not in out.stdout + out.stderr, shown
        return out

    git("update-ref", "refs/remotes/origin/main", "HEAD~3")  # the demo's start, as a pull request's base
    message = tmp_path / "COMMIT_EDITMSG"
    message.write_text("Fix a typo in the docs\n")
    if not (demo / "verifier.yaml").exists():
        (tmp_path / "verifier.yaml").write_text("version: 1\n")
    policy_file = demo / "verifier.yaml" if (demo / "verifier.yaml").exists() else tmp_path / "verifier.yaml"
    ran: list[str] = []

    def documented(*args: str, expect: set[int]) -> subprocess.CompletedProcess[str]:
        ran.append(shape("verifier " + " ".join(args)))
        return run(*args, expect=expect)

    documented("check", "origin/main..HEAD", expect={1})  # the demo's pull request: one commit leaves lines untested
    documented("check", git("rev-parse", "--short", "HEAD~1"), expect={0, 1})
    documented("check", "--staged", "--message-file", str(message), expect={0})  # no trailer: nothing to verify
    documented("check", expect={0, 1})
    documented("check", "HEAD", "--format", "json", "--output", str(tmp_path / "report.json"), expect={0, 1})
    assert json.loads((tmp_path / "report.json").read_text())["verdict"] in ("pass", "warn", "block")
    alone = documented("check", "HEAD", "--format", "json", expect={0, 1})
    assert json.loads(alone.stdout)["verdict"] in ("pass", "warn", "block")  # a machine format alone on stdout
    documented("rules", expect={0})
    documented("rules", "coverage.new-lines", expect={0})
    documented("policy", "check", str(policy_file), expect={0})
    documented("sandbox", "doctor", expect={0})
    parts = [tmp_path / f"part-{k}.json" for k in (1, 2)]
    for k, part in enumerate(parts, 1):
        documented("check", "HEAD", "--part", f"{k}/2", "--format", "json", "--output", str(part), expect={4})
    joined = documented("join", *map(str, parts), expect={0, 1})
    assert "PART" not in joined.stdout.splitlines()[0]
    documented("hooks", "install", expect={0})
    documented("hooks", "status", expect={0})
    gate_report = tmp_path / "gate-report"
    documented("check", "origin/main..HEAD", "--format", "all", "--output", f"{gate_report}/", expect={1})
    assert {p.suffix for p in gate_report.iterdir()} >= {".txt", ".json", ".sarif", ".md", ".xml"}
    since = git("log", "-1", "--reverse", "--format=%cs", "HEAD~3")
    documented("audit", "--since", since, "--format", "html", "--output", str(tmp_path / "audit.html"), expect={0})
    assert "<svg" in (tmp_path / "audit.html").read_text()
    assert not {shape(c) for c in readme_commands()} - set(ran), "a documented command line this test never ran"
