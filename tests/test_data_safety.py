"""Nothing is lost: HEAD, refs, index, stash, working tree and untracked files are byte-identical after a
run, also one interrupted by SIGINT; and an interrupted run leaves no process and no temporary folder."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
import uuid
from pathlib import Path

from conftest import ROOT, machine, processes_carrying, run_check, snapshot, test_sandbox

from verifier.demo import scenario as demo
from verifier.demo.scratch import ScratchRepo

SLOW_TEST = "import time\nfrom parcelkit.slow import nap\n\n\ndef test_nap():\n    nap()\n"
SLOW_CODE = "import time\n\n\ndef nap():\n    time.sleep(600)\n"


def busy_repo(repo: ScratchRepo) -> str:
    """A repository with a stash, staged and unstaged edits and untracked files around a slow machine commit.

    Returns a marker that every process of the test run carries on its command line (a pytest -k
    argument from the policy), so that leftovers can be found afterwards.
    """
    marker = f"probe_{uuid.uuid4().hex}"
    policy = f'version: 1\ntests:\n  args: ["-k", "not {marker}"]\n'
    repo.commit(
        "Start",
        {
            "parcelkit/__init__.py": "",
            "parcelkit/rates.py": demo.RATES,
            "tests/test_rates.py": demo.TEST_RATES,
            "verifier.yaml": policy,
        },
    )
    repo.commit(machine("Slow"), {"parcelkit/slow.py": SLOW_CODE, "tests/test_slow.py": SLOW_TEST})
    repo.write({"parcelkit/rates.py": demo.ROUNDING})
    repo.git("stash", "-q")
    repo.write({"README.md": "staged\n"})
    repo.git("add", "README.md")
    repo.write({"README.md": "staged, then edited\n", "notes/untracked.txt": "mine\n", "parcelkit/rates.py": "# wip\n"})
    return marker


def test_a_full_run_changes_nothing(repo: ScratchRepo) -> None:
    busy_repo(repo)
    repo.commit(machine("Fast"), {"tests/test_slow.py": "def test_ok():\n    assert True\n"})
    repo.write({"README.md": "dirty again\n"})
    before = snapshot(repo.path)
    out = run_check(repo, "HEAD~2..HEAD")
    assert out.report is not None
    assert snapshot(repo.path) == before


def test_sigint_mid_run_changes_nothing_and_leaves_nothing(repo: ScratchRepo, tmp_path: Path) -> None:
    marker = busy_repo(repo)
    before = snapshot(repo.path)
    private_tmp = tmp_path / "private-tmp"
    private_tmp.mkdir()
    env = {**os.environ, "PYTHONPATH": str(ROOT), "TMPDIR": str(private_tmp)}
    command = [sys.executable, "-m", "verifier", "-C", str(repo.path), "check", "HEAD", "--sandbox", test_sandbox()]
    proc = subprocess.Popen(command, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and not any(p.name.startswith("verifier-") for p in private_tmp.iterdir()):
        time.sleep(0.1)
    time.sleep(2)  # let the sandbox start the slow test
    proc.send_signal(signal.SIGINT)
    _out, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    assert "interrupted" in err and "Traceback" not in err
    assert snapshot(repo.path) == before
    assert list(private_tmp.iterdir()) == []
    time.sleep(0.5)
    assert processes_carrying(str(private_tmp)) == []
    assert processes_carrying(marker) == []
