"""A new user's first contact with the command line, end to end with the real CLI on real repositories:
one clear message for a repository without tests, the doctor's single reasons and its word on ``auto``,
per-test progress on a terminal (a real pseudo-terminal) and none when piped, the failing assertion's
excerpt, a did-you-mean for rule ids, and counted nouns that agree with their number."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import ROOT, machine, test_sandbox

from verifier.demo.scratch import ScratchRepo


def verifier(repo: Path, *args: str, env: dict | None = None) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "verifier", "-C", str(repo), *args],
        capture_output=True,
        text=True,
        timeout=300,
        env={**os.environ, "PYTHONPATH": str(ROOT), "NO_COLOR": "1", **(env or {})},
    )


SUMS = "def add(a, b):\n    return a + b\n"


@pytest.fixture
def repo(tmp_path: Path) -> ScratchRepo:
    scratch = ScratchRepo(tmp_path / "repo")
    scratch.commit("Start inkwell", {"inkwell/__init__.py": "", "inkwell/sums.py": SUMS})
    return scratch


def test_a_misspelt_rule_id_gets_the_nearest_one(repo: ScratchRepo) -> None:
    done = verifier(repo.path, "rules", "covrage.new-lines")
    assert done.returncode == 2, done.stderr
    assert "unknown rule 'covrage.new-lines'; did you mean 'coverage.new-lines'?" in done.stderr
    assert "Traceback" not in done.stderr


def test_a_rule_id_near_nothing_gets_no_guess(repo: ScratchRepo) -> None:
    done = verifier(repo.path, "rules", "zzzz")
    assert done.returncode == 2 and "unknown rule 'zzzz'" in done.stderr and "did you mean" not in done.stderr


def test_a_known_rule_id_is_explained(repo: ScratchRepo) -> None:
    done = verifier(repo.path, "rules", "coverage.new-lines")
    assert done.returncode == 0 and done.stdout.startswith("coverage.new-lines: ")


TEST_ADD = "from inkwell.sums import add\n\n\ndef test_add():\n    assert add(2, 3) == 5\n"


def test_counted_nouns_agree_with_one(repo: ScratchRepo) -> None:
    """One machine commit changing one line of one file: "1 commit", "1 file", never "(s)"."""
    base = repo.commit("Human: a test for add", {"tests/test_add.py": TEST_ADD})
    head = repo.commit(machine("Add in the other order"), {"inkwell/sums.py": SUMS.replace("a + b", "b + a")})
    done = verifier(repo.path, "check", f"{base}..{head}", "--sandbox", test_sandbox(), "--no-notes")
    assert done.returncode in (0, 1), done.stdout + done.stderr
    assert ", 1 commit, " in done.stdout
    assert "machine-written lines: 1 in 1 file\n" in done.stdout
    assert "verifier: 1 machine-written line in 1 file\n" in done.stderr
    assert "(s)" not in done.stdout + done.stderr and "1 errors" not in done.stdout
    assert "0 errors" in done.stdout  # zero takes the plural, as English does


def test_the_plural_helper_counts_in_english() -> None:
    from verifier.words import counted

    assert [counted(n, "file") for n in (0, 1, 2)] == ["0 files", "1 file", "2 files"]
    assert counted(1, "patch", "patches") == "1 patch" and counted(3, "patch", "patches") == "3 patches"


def auto_pick(env: dict) -> str:
    """The backend ``--sandbox auto`` really takes in ``env`` (the registry's own choice, in a fresh process)."""
    probe = "from verifier.sandbox import choose; print(choose('auto', allow_process=False).name)"
    full_env = {**os.environ, "PYTHONPATH": str(ROOT), **env}
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, env=full_env)
    return done.stdout.strip() or "none"


def test_the_doctor_gives_the_docker_reason_once_and_says_what_auto_takes(repo: ScratchRepo, tmp_path: Path) -> None:
    env = {"DOCKER_HOST": f"unix://{tmp_path}/no-engine.sock"}
    done = verifier(repo.path, "sandbox", "doctor", env=env)
    assert done.returncode == 0, done.stderr
    assert done.stdout.count("the socket does not exist") == 1, done.stdout
    assert done.stdout.count("start the engine") == 1, done.stdout
    pick = auto_pick(env)
    assert pick != "docker"
    assert f"--sandbox auto will use {pick} here: the strongest backend that works" in done.stdout
    assert "docker: unavailable" in done.stdout.splitlines()[-1]


def test_the_doctor_names_the_backend_auto_takes_in_this_environment(repo: ScratchRepo) -> None:
    done = verifier(repo.path, "sandbox", "doctor")
    pick = auto_pick({})
    last = done.stdout.splitlines()[-1]
    assert last.startswith(f"--sandbox auto will use {pick} here") if pick != "none" else "auto" in last


CHECKS = "from inkwell.sums import add\n\n\ndef expect_sum(a, b, total):\n    assert add(a, b) == total\n"
TEST_VIA_HELPER = "from inkwell.checks import expect_sum\n\n\ndef test_add():\n    expect_sum(2, 2, 4)\n"
TEST_DIRECT = "from inkwell.sums import add\n\n\ndef test_add():\n    assert add(2, 2) == 4{message}\n"


def failing_line(repo: ScratchRepo, base_files: dict[str, str]) -> str:
    """The terminal's tests.failing line after a machine commit breaks ``add`` (the tests are a human's)."""
    base = repo.commit("Human: tests for add", base_files)
    head = repo.commit(machine("Faster add"), {"inkwell/sums.py": SUMS.replace("a + b", "a + b + 1")})
    done = verifier(repo.path, "check", f"{base}..{head}", "--sandbox", test_sandbox(), "--no-notes")
    assert done.returncode == 1, done.stdout + done.stderr
    return next(line for line in done.stdout.splitlines() if "[tests.failing]" in line)


def test_a_failing_assert_shows_the_statement_and_pytests_values(repo: ScratchRepo) -> None:
    line = failing_line(repo, {"tests/test_add.py": TEST_DIRECT.format(message="")})
    # pytest rewrites asserts in test modules and reports the compared values ("assert 5 == 4")
    assert line.endswith("tests/test_add.py::test_add failed: assert add(2, 2) == 4 (assert 5 == 4)"), line


def test_a_bare_assertion_error_still_shows_what_was_asserted(repo: ScratchRepo) -> None:
    """pytest does not rewrite asserts in a non-test module: its report says only ``E AssertionError``."""
    line = failing_line(repo, {"inkwell/checks.py": CHECKS, "tests/test_add.py": TEST_VIA_HELPER})
    assert line.endswith("failed: assert add(a, b) == total"), line


def test_the_assertion_excerpt_is_escaped_and_capped(repo: ScratchRepo) -> None:
    message = ', "wrong total \\x1b[2J' + "x" * 400 + '"'
    line = failing_line(repo, {"tests/test_add.py": TEST_DIRECT.format(message=message)})
    assert "\x1b" not in line and "wrong total \\x1b[2J" in line  # the escape shown, not obeyed
    assert line.endswith("…") and "x" * 400 not in line


def test_a_repository_without_tests_gets_one_message_and_exit_3(repo: ScratchRepo) -> None:
    base = repo.head()
    head = repo.commit(machine("Add mul"), {"inkwell/sums.py": SUMS + "\n\ndef mul(a, b):\n    return a * b\n"})
    done = verifier(repo.path, "check", f"{base}..{head}", "--sandbox", test_sandbox(), "--no-notes")
    assert done.returncode == 3, done.stdout + done.stderr  # ExitCode.UNVERIFIED: fail closed, never a pass
    terminal = done.stdout + done.stderr
    assert done.stdout.startswith("ERROR")
    added = int(repo.git("diff", "--numstat", base, head).split()[0])  # git's own count of the added lines
    assert (
        f"no tests were collected at {head[:12]} (pytest looked in the repository, or its pytest configuration's "
        f"testpaths): the {added} machine-written lines in 1 file cannot be verified; add tests (pytest collects "
        "test_*.py and *_test.py files), or point the policy's tests.paths" in done.stdout
    )
    # pytest's own console ("test session starts", "collected 0 items"), coverage.py's warning, the status word
    for raw in ("test session starts", "collected 0 items", "CoverageWarning", "No data was collected", "no-tests"):
        assert raw not in terminal, raw


def test_the_no_tests_message_names_the_policys_test_paths(repo: ScratchRepo) -> None:
    policy = {"verifier.yaml": "version: 1\ntests:\n  paths: [checks]\n", "checks/helpers.py": "LIMIT = 3\n"}
    base = repo.commit("Human: tests are to live in checks/", policy)
    head = repo.commit(machine("Add mul"), {"inkwell/sums.py": SUMS + "\n\ndef mul(a, b):\n    return a * b\n"})
    done = verifier(repo.path, "check", f"{base}..{head}", "--sandbox", test_sandbox(), "--no-notes")
    assert done.returncode == 3, done.stdout + done.stderr
    assert "pytest looked in the policy's tests.paths (checks)" in done.stdout


def test_a_tests_path_missing_from_the_tree_gets_one_message_and_exit_3(repo: ScratchRepo) -> None:
    policy = {"verifier.yaml": "version: 1\ntests:\n  paths: [checks]\n", "tests/test_add.py": TEST_ADD}
    base = repo.commit("Human: tests are said to live in checks/", policy)
    head = repo.commit(machine("Add mul"), {"inkwell/sums.py": SUMS + "\n\ndef mul(a, b):\n    return a * b\n"})
    done = verifier(repo.path, "check", f"{base}..{head}", "--sandbox", test_sandbox(), "--no-notes")
    assert done.returncode == 3, done.stdout + done.stderr
    output = done.stdout + done.stderr
    assert "tests.paths names 'checks', which the tree under test does not have" in output
    assert "file or directory not found" not in output and "Traceback" not in output  # no pytest console


def test_a_repository_with_a_test_is_not_told_it_has_none(repo: ScratchRepo) -> None:
    base = repo.commit("Human: a test for add", {"tests/test_add.py": TEST_ADD})
    head = repo.commit(machine("Add in the other order"), {"inkwell/sums.py": SUMS.replace("a + b", "b + a")})
    done = verifier(repo.path, "check", f"{base}..{head}", "--sandbox", test_sandbox(), "--no-notes")
    assert done.returncode == 0, done.stdout + done.stderr
    assert "no tests were collected" not in done.stdout


SLOW_TEST = (
    "import time\n\nfrom inkwell.sums import add\n\n\n"
    "def test_slow_{n}():\n    time.sleep(1)\n    assert add({n}, 1) == {n} + 1\n"
)
SLOW_FILES = {f"tests/test_slow_{n}.py": SLOW_TEST.format(n=n) for n in range(3)}


def slow_change(repo: ScratchRepo) -> str:
    base = repo.commit("Human: slow tests", SLOW_FILES)
    head = repo.commit(machine("Add in the other order"), {"inkwell/sums.py": SUMS.replace("a + b", "b + a")})
    return f"{base}..{head}"


def on_a_terminal(repo: Path, *args: str) -> tuple[int, str]:
    """Run the CLI with stdout and stderr on a real pseudo-terminal (Python's pty module), 200 columns wide."""
    import fcntl
    import pty
    import select
    import struct
    import termios

    main, child = pty.openpty()
    fcntl.ioctl(child, termios.TIOCSWINSZ, struct.pack("HHHH", 50, 200, 0, 0))
    process = subprocess.Popen(
        [sys.executable, "-m", "verifier", "-C", str(repo), *args],
        stdin=subprocess.DEVNULL,
        stdout=child,
        stderr=child,
        env={**os.environ, "PYTHONPATH": str(ROOT), "NO_COLOR": "1"},
    )
    os.close(child)
    screen = b""
    while True:
        if not select.select([main], [], [], 300)[0]:
            process.kill()
            break
        try:
            data = os.read(main, 1 << 16)
        except OSError:  # the terminal's other side closed: the CLI ended
            break
        if not data:
            break
        screen += data
    os.close(main)
    return process.wait(timeout=60), screen.decode("utf-8", "replace")


PROGRESS = r"tests (\d)/3 done, (\d) left \(\d+\.\ds\) . running (tests/test_slow_\d\.py::test_slow_\d)"


def test_a_terminal_shows_which_test_runs_and_how_many_are_left(repo: ScratchRepo, tmp_path: Path) -> None:
    report_file = tmp_path / "report.json"
    args = ("check", slow_change(repo), "--sandbox", test_sandbox(), "--no-notes", "--all-tests")
    code, screen = on_a_terminal(repo.path, *args, "--format", "json", "--output", str(report_file))
    assert code == 0, screen
    shown = re.findall(PROGRESS, screen)
    assert shown, screen
    assert all(int(done) + int(left) == 3 for done, left, _test in shown)
    assert {test for _done, _left, test in shown} <= {f"tests/test_slow_{n}.py::test_slow_{n}" for n in range(3)}
    # the supervisor's progress lines are taken out of what the report keeps of the run's output
    assert "verifier-progress-" not in screen and "verifier-progress-" not in report_file.read_text()


def test_the_map_build_at_base_shows_its_progress_too(repo: ScratchRepo) -> None:
    """Without a map, the whole suite runs at base first (the longest wait of a first check)."""
    code, screen = on_a_terminal(repo.path, "check", slow_change(repo), "--sandbox", test_sandbox(), "--no-notes")
    assert code == 0, screen
    first = re.search(PROGRESS, screen)
    assert first is not None and "building the who-tests-what map" in screen, screen
    assert first.start() < screen.index("running the tests in the")  # shown while the map was being built


def test_piped_output_stays_plain_without_per_test_progress(repo: ScratchRepo, tmp_path: Path) -> None:
    report_file = tmp_path / "report.json"
    args = ("check", slow_change(repo), "--sandbox", test_sandbox(), "--no-notes", "--all-tests")
    done = verifier(repo.path, *args, "--format", "json", "--output", str(report_file))
    assert done.returncode == 0, done.stderr
    assert "verifier: running the tests in the" in done.stderr
    assert "\r" not in done.stderr and "\x1b" not in done.stderr and "done, " not in done.stderr
    assert "verifier-progress-" not in done.stderr + done.stdout + report_file.read_text()


def test_a_machine_commit_that_removes_every_test_cannot_pass(repo: ScratchRepo) -> None:
    """An assistant deletes the only test and changes the code: nothing is collected, so nothing is verified."""
    base = repo.commit("Human: a test for add", {"tests/test_add.py": TEST_ADD})
    broken = {"inkwell/sums.py": SUMS.replace("a + b", "a - b")}
    head = repo.commit(machine("Simplify"), broken, remove=("tests/test_add.py",))
    done = verifier(repo.path, "check", f"{base}..{head}", "--sandbox", test_sandbox(), "--no-notes")
    assert done.returncode in (1, 3), done.stdout + done.stderr  # a block (the deleted test) or unverified
    assert "no tests were collected" in done.stdout and "[tests.weakened]" in done.stdout


def test_on_a_terminal_a_failing_change_still_blocks(repo: ScratchRepo, tmp_path: Path) -> None:
    """The progress stream changes what the terminal shows, never the verdict or the kept output."""
    base = repo.commit("Human: slow tests", SLOW_FILES)
    head = repo.commit(machine("Off by one"), {"inkwell/sums.py": SUMS.replace("a + b", "a + b + 1")})
    report_file = tmp_path / "report.json"
    args = ("check", f"{base}..{head}", "--sandbox", test_sandbox(), "--no-notes", "--all-tests")
    code, screen = on_a_terminal(repo.path, *args, "--format", "json", "--output", str(report_file))
    assert code == 1, screen
    report = json.loads(report_file.read_text())
    failing = [f for f in report["findings"] if f["rule"] == "tests.failing"]
    assert len(failing) == 3 and report["verdict"] == "block"
    assert re.search(PROGRESS, screen), screen
