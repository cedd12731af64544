"""Where a check's output goes, end to end with the real CLI on real repositories: a machine format alone
on stdout, the text view on stderr, the --output file truthful at every exit (errors, interrupts), the
version, and the registries the command line reads its choices from."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
import xml.etree.ElementTree as ET
from pathlib import Path

import jsonschema
import pytest
import tomllib
from conftest import ROOT, machine, processes_carrying, test_sandbox

from verifier.demo import scenario as demo
from verifier.demo.scratch import ScratchRepo

BASE_FILES = {"parcelkit/__init__.py": "", "parcelkit/rates.py": demo.RATES, "tests/test_rates.py": demo.TEST_RATES}
# The SARIF 2.1.0 schema as OASIS publishes it (tests/data holds a copy of ../shared/standards).
SARIF_SCHEMA = json.loads((Path(__file__).parent / "data" / "sarif-schema-2.1.0.json").read_text())
STALE_PASS = '{"format": 1, "verdict": "pass"}\n'


def gate(repo: Path, *args: str, cwd: Path | None = None, env: dict | None = None) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "verifier", "-C", str(repo), *args],
        capture_output=True,
        text=True,
        timeout=300,
        cwd=cwd,
        env={**os.environ, "PYTHONPATH": str(ROOT), "NO_COLOR": "1", **(env or {})},
    )


@pytest.fixture(scope="module")
def changes(tmp_path_factory: pytest.TempPathFactory) -> dict[str, str | Path]:
    """A machine-written change that blocks (a broken test), and a human commit after it."""
    repo = ScratchRepo(tmp_path_factory.mktemp("output") / "repo")
    base = repo.commit("Start parcelkit", BASE_FILES)
    blocked = repo.commit(machine("Simpler rounding"), {"parcelkit/rates.py": demo.ROUNDING})
    human = repo.commit("Human: readme", {"README.md": "# parcelkit\n"})
    return {"repo": repo.path, "block": f"{base}..{blocked}", "human": human}


def test_a_machine_format_without_output_goes_alone_to_stdout(changes: dict, tmp_path: Path) -> None:
    done = gate(
        changes["repo"], "check", changes["block"], "--sandbox", test_sandbox(), "--format", "json", "--no-notes"
    )
    assert done.returncode == 1, done.stderr
    report = json.loads(done.stdout)  # the whole of stdout is one JSON document (json.loads refuses extra data)
    assert report["verdict"] == "block"
    assert "BLOCK" in done.stderr and "tests.failing" in done.stderr  # the text view, on stderr


def test_output_dash_is_stdout_not_a_file_named_dash(changes: dict, tmp_path: Path) -> None:
    args = ("check", changes["block"], "--sandbox", test_sandbox(), "--format", "junit", "--output", "-", "--no-notes")
    done = gate(changes["repo"], *args, cwd=tmp_path)
    assert done.returncode == 1, done.stderr
    root = ET.fromstring(done.stdout)  # Python's XML reader takes the whole of stdout as one document
    assert root.tag == "testsuites"
    assert not (tmp_path / "-").exists() and not (Path(changes["repo"]) / "-").exists()


def test_the_text_view_alone_stays_on_stdout(changes: dict) -> None:
    done = gate(changes["repo"], "check", changes["human"], "--no-notes")
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith("PASS")


def test_two_machine_formats_cannot_share_stdout(changes: dict) -> None:
    done = gate(changes["repo"], "check", changes["human"], "--format", "json", "--format", "sarif", "--no-notes")
    assert done.returncode == 2
    assert "cannot share stdout" in done.stderr and "--output FOLDER" in done.stderr and done.stdout == ""


def test_an_error_replaces_a_stale_report_with_an_error_report(changes: dict, tmp_path: Path) -> None:
    """A CI step that reads the report after a failed check must never find an old PASS."""
    folder = tmp_path / "reports"
    folder.mkdir()
    for name in ("report.json", "report.sarif", "report.junit.xml", "report.md", "report.txt"):
        (folder / name).write_text(STALE_PASS)
    done = gate(changes["repo"], "check", "no-such-revision", "--format", "all", "--output", str(folder))
    assert done.returncode == 2 and "no-such-revision" in done.stderr
    report = json.loads((folder / "report.json").read_text())
    assert report["verdict"] == "error" and report["exit_code"] == 2 and "no-such-revision" in report["error"]
    sarif = json.loads((folder / "report.sarif").read_text())
    jsonschema.validate(sarif, SARIF_SCHEMA)  # the OASIS schema
    assert sarif["runs"][0]["invocations"][0]["executionSuccessful"] is False
    junit = ET.parse(folder / "report.junit.xml").getroot()
    assert junit.get("errors") == "1" and junit.get("failures") == "0"
    assert (folder / "report.md").read_text().startswith("## ERROR · verifier · ")
    assert (folder / "report.txt").read_text().startswith("ERROR")
    assert not [p.name for p in folder.iterdir() if p.name.startswith(".")]  # no temporary file left behind


def test_an_honest_check_replaces_a_stale_report_with_its_verdict(changes: dict, tmp_path: Path) -> None:
    target = tmp_path / "report.json"
    target.write_text('{"format": 1, "verdict": "block"}\n')
    done = gate(changes["repo"], "check", changes["human"], "--format", "json", "--output", str(target), "--no-notes")
    assert done.returncode == 0, done.stderr
    assert json.loads(target.read_text())["verdict"] == "pass"
    assert done.stdout.startswith("PASS")  # with --output, the text view is on stdout


SLOW_TEST = """import subprocess
import sys

from parcelkit.rates import price


def test_slow_price():
    # a child whose command line carries the marker: the host sees that the tests have started
    subprocess.run([sys.executable, "-c", "import time; time.sleep(120)", "{marker}"], check=True)
    assert price(1) == 5.70
"""


@pytest.mark.parametrize("stop", [signal.SIGTERM, signal.SIGINT], ids=["sigterm", "sigint"])
def test_an_interrupted_check_leaves_an_error_report_not_the_old_one(tmp_path: Path, stop: signal.Signals) -> None:
    """A cancelled CI job (SIGTERM) or Ctrl-C (SIGINT) while the tests run: the report says so, exit 130."""
    marker = f"verifier-interrupt-{os.getpid()}-{stop.name}"
    repo = ScratchRepo(tmp_path / "repo")
    repo.commit("Start parcelkit", BASE_FILES)
    sha = repo.commit(machine("A slow test"), {"tests/test_slow.py": SLOW_TEST.replace("{marker}", marker)})
    target = tmp_path / "report.json"
    target.write_text(STALE_PASS)
    command = [sys.executable, "-m", "verifier", "-C", str(repo.path), "check", sha, "--sandbox", test_sandbox()]
    command += ["--format", "json", "--output", str(target), "--no-notes"]
    proc = subprocess.Popen(
        command,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env={**os.environ, "PYTHONPATH": str(ROOT), "NO_COLOR": "1"},
    )
    try:
        deadline = time.monotonic() + 120
        while not processes_carrying(marker) and time.monotonic() < deadline:
            time.sleep(0.2)
        assert processes_carrying(marker), "the tests never started"
        assert not target.exists()  # the stale report went at the start
        time.sleep(1)
        proc.send_signal(stop)
        _, stderr = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 130, stderr
    report = json.loads(target.read_text())
    assert report["verdict"] == "error" and "interrupted" in report["error"]
    deadline = time.monotonic() + 10
    while processes_carrying(marker) and time.monotonic() < deadline:
        time.sleep(0.2)
    assert processes_carrying(marker) == []


def test_version_is_the_package_version() -> None:
    done = gate(ROOT, "--version")
    expected = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["version"]
    assert done.returncode == 0 and done.stdout.strip() == f"verifier {expected}"


def test_the_command_line_offers_what_the_registries_hold() -> None:
    from verifier import report, sandbox

    help_text = gate(ROOT, "check", "--help").stdout.replace("\n", " ")
    for name in (*sandbox.CHOICES, *report.FORMATS):
        assert name in help_text
    for fmt in report.FORMATS:
        module = report.format_module(fmt)
        assert isinstance(module.SUFFIX, str) and isinstance(module.FOR_MACHINES, bool) and callable(module.render)
    assert not report.for_machines("text") and all(report.for_machines(f) for f in report.FORMATS if f != "text")


FORMAT_MODULE = '''"""A format made for this test: the verdict and nothing else."""

SUFFIX = "verdict"
FOR_MACHINES = True


def render(report):
    return report.verdict + "\\n"
'''


def test_a_new_format_is_one_module_and_one_entry(changes: dict, tmp_path: Path) -> None:
    (tmp_path / "verdict_only.py").write_text(FORMAT_MODULE)
    probe = (
        "import sys; import verifier.report as r; r.FORMATS['verdict'] = 'verdict_only'; "
        "from verifier.cli.main import main; sys.exit(main(sys.argv[1:]))"
    )
    done = subprocess.run(
        [sys.executable, "-c", probe, "-C", str(changes["repo"]), "check", changes["human"], "--format", "verdict"],
        capture_output=True,
        text=True,
        env={**os.environ, "PYTHONPATH": f"{ROOT}:{tmp_path}", "NO_COLOR": "1"},
    )
    assert done.returncode == 0, done.stderr
    assert done.stdout == "pass\n" and done.stderr.startswith("PASS")


def test_an_unknown_sandbox_is_refused_with_the_choices(changes: dict) -> None:
    done = gate(changes["repo"], "check", changes["human"], "--sandbox", "chroot")
    assert done.returncode == 2 and "invalid choice: 'chroot'" in done.stderr and "namespace" in done.stderr


def test_check_staged_without_the_trailer_imports_nothing_heavy(tmp_path: Path) -> None:
    """The commit hook's common case stays fast: the parser is built (every subcommand's options, the
    registries' choices left unread) and nothing of the pipeline, the sandbox, yaml or pytest is imported."""
    message = tmp_path / "MSG"
    message.write_text("Fix a typo\n")
    probe = (
        "import sys; from verifier.cli.main import main; code = main(['check', '--staged', '--message-file', "
        "sys.argv[1]]); print(code, sorted(sys.modules))"
    )
    done = subprocess.run(
        [sys.executable, "-c", probe, str(message)],
        capture_output=True,
        text=True,
        cwd=tmp_path,
        env={**os.environ, "PYTHONPATH": str(ROOT)},
    )
    assert done.returncode == 0, done.stderr
    code, loaded = done.stdout.strip().split("\n")[-1].split(" ", 1)
    assert code == "0"
    heavy = ("verifier.pipeline", "verifier.sandbox", "verifier.policy", "verifier.report.text", "yaml", "pytest")
    assert [name for name in heavy if f"'{name}'" in loaded] == []
