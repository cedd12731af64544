"""The report formats, from real gate runs: SARIF against the OASIS schema, Markdown, JUnit XML against
pytest's own JUnit report, and the terminal view on a real pseudo-terminal."""

from __future__ import annotations

import json
import os
import pty
import select
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import jsonschema
import pytest
from conftest import ROOT, machine, test_sandbox

from verifier.demo import scenario as demo
from verifier.demo.scratch import ScratchRepo
from verifier.report.text import StageDisplay
from verifier.rules.catalog import load_all

# The SARIF 2.1.0 schema as OASIS publishes it (copied from ../shared/standards so a clean clone has it).
SARIF_SCHEMA = json.loads((Path(__file__).parent / "data" / "sarif-schema-2.1.0.json").read_text())
BASE_FILES = {"parcelkit/__init__.py": "", "parcelkit/rates.py": demo.RATES, "tests/test_rates.py": demo.TEST_RATES}


def gate(repo: Path, *args: str, env: dict | None = None) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "verifier", "-C", str(repo), "check", *args, "--no-notes"],
        capture_output=True,
        text=True,
        env={**os.environ, "PYTHONPATH": str(ROOT), **(env or {})},
    )


@pytest.fixture(scope="module")
def outputs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Two runs: a machine-written change that blocks (a broken test, uncovered lines), a human one."""
    root = tmp_path_factory.mktemp("formats")
    repo = ScratchRepo(root / "repo")
    base = repo.commit("Start parcelkit", BASE_FILES)
    repo.commit(
        machine("Zones, and simpler rounding"),
        {
            "parcelkit/zones.py": demo.ZONES,
            "tests/test_zones.py": demo.TEST_ZONES,
            "parcelkit/rates.py": demo.ROUNDING,
        },
    )
    human = repo.commit("Human: readme", {"README.md": "# parcelkit\n"})
    blocked = gate(
        repo.path, f"{base}..{human}", "--sandbox", test_sandbox(), "--format", "all", "--output", str(root / "block")
    )
    assert blocked.returncode == 1, blocked.stderr
    passed = gate(repo.path, human, "--format", "all", "--output", str(root / "pass"))
    assert passed.returncode == 0, passed.stderr
    return {"block": root / "block", "pass": root / "pass", "repo": repo.path, "head": Path(human)}


def load(folder: Path, name: str) -> str:
    return (folder / name).read_text(encoding="utf-8")


def test_output_folder_holds_every_format(outputs: dict[str, Path]) -> None:
    names = sorted(p.name for p in outputs["block"].iterdir())
    assert names == ["report.json", "report.junit.xml", "report.md", "report.sarif", "report.txt"]


@pytest.mark.parametrize("case", ["block", "pass"])
def test_sarif_validates_against_the_schema(outputs: dict[str, Path], case: str) -> None:
    log = json.loads(load(outputs[case], "report.sarif"))
    validator = jsonschema.Draft4Validator(SARIF_SCHEMA)
    errors = sorted(validator.iter_errors(log), key=str)
    assert not errors, "\n".join(f"{list(e.absolute_path)}: {e.message}" for e in errors[:5])
    assert log["version"] == "2.1.0"


def test_sarif_carries_rules_results_and_facts(outputs: dict[str, Path]) -> None:
    log = json.loads(load(outputs["block"], "report.sarif"))
    report = json.loads(load(outputs["block"], "report.json"))
    run = log["runs"][0]
    rules = {rule["id"]: rule for rule in run["tool"]["driver"]["rules"]}
    for registered in load_all().values():
        assert rules[registered.id]["fullDescription"]["text"] == (registered.explanation or registered.summary)
        assert registered.explanation in rules[registered.id]["help"]["text"]
    results = run["results"]
    assert len(results) == len(report["findings"])
    assert all(run["tool"]["driver"]["rules"][r["ruleIndex"]]["id"] == r["ruleId"] for r in results)
    failing = [r for r in results if r["ruleId"] == "tests.failing"]
    assert failing and all(r["level"] == "error" for r in failing)
    located = {
        (
            r["locations"][0]["physicalLocation"]["artifactLocation"]["uri"],
            r["locations"][0]["physicalLocation"]["region"]["startLine"],
        )
        for r in results
        if r["ruleId"] == "coverage.new-lines" and "locations" in r
    }
    assert located == {(path, line) for path, lines in report["coverage"]["uncovered"].items() for line in lines}
    facts = run["properties"]
    assert facts["provenance"]["agents"] == [demo.AGENT]
    assert facts["tests"]["failed"] == report["tests"]["failed"] and facts["tests"]["run"] == report["tests"]["run"]
    assert facts["coverage"]["percent"] == report["coverage"]["percent"]
    assert run["invocations"][0]["exitCode"] == 1


def test_markdown_puts_the_verdict_and_counts_first_then_a_table_per_file_then_details(
    outputs: dict[str, Path],
) -> None:
    text = load(outputs["block"], "report.md")
    report = json.loads(load(outputs["block"], "report.json"))
    heading = text.splitlines()[0]
    blocking = sum(1 for f in report["findings"] if f["severity"] in ("block", "error"))
    assert heading.startswith("## BLOCK · verifier · ") and f"{len(report['findings'])} findings" in heading
    assert f"{blocking} blocking" in heading
    rows = {row.split(" | ")[0]: row for row in text.splitlines() if row.startswith("| `")}
    for path, lines in report["machine_lines"].items():
        assert f" | {len(lines)} | " in rows[f"| `{path}`"]
    uncovered = report["coverage"]["uncovered"]["parcelkit/zones.py"]
    assert f"| {len(uncovered)}: " in rows["| `parcelkit/zones.py`"]
    assert text.index("| File |") < text.index("### Findings") < text.index("<details")
    assert "`tests.failing`" in text and "extra = 7.5" in text  # a finding's code excerpt
    assert text.count("<details") == text.count("</details>") >= 2
    assert "<details open><summary>parcelkit/zones.py: " in text  # a file with a blocking finding is unfolded
    assert load(outputs["pass"], "report.md").startswith("## PASS · verifier · ")


def test_junit_counts_match_the_report_and_pytest_itself(outputs: dict[str, Path], tmp_path: Path) -> None:
    ours = ET.fromstring(load(outputs["block"], "report.junit.xml"))
    report = json.loads(load(outputs["block"], "report.json"))
    suite = ours.find("testsuite")
    assert suite is not None
    assert int(suite.get("tests")) == report["tests"]["run"]
    assert int(suite.get("failures")) == report["tests"]["failed"]
    assert int(suite.get("errors")) == report["tests"]["errors"]
    # pytest's own --junitxml on the same tests of the same tree is the outside reference.
    tree = tmp_path / "tree"
    subprocess.run(
        ["git", "worktree", "add", "-q", "--detach", str(tree), str(outputs["head"])], cwd=outputs["repo"], check=True
    )
    cases = [(c.get("classname"), c.get("name")) for c in suite.iter("testcase")]
    node_ids = [f"{cls.replace('.', '/', cls.count('.'))}.py::{name}" for cls, name in cases]
    subprocess.run(
        [
            sys.executable,
            "-m",
            "pytest",
            "-q",
            "-p",
            "no:cacheprovider",
            "--junitxml=theirs.xml",
            "-o",
            "junit_family=xunit2",
            *node_ids,
        ],
        cwd=tree,
        capture_output=True,
    )
    theirs = ET.parse(tree / "theirs.xml").getroot().find("testsuite")
    assert theirs is not None
    for key in ("tests", "failures", "errors", "skipped"):
        assert suite.get(key) == theirs.get(key), key
    assert sorted(cases) == sorted((c.get("classname"), c.get("name")) for c in theirs.iter("testcase"))


def test_junit_of_a_change_with_no_run_is_an_empty_suite(outputs: dict[str, Path]) -> None:
    suite = ET.fromstring(load(outputs["pass"], "report.junit.xml")).find("testsuite")
    assert suite is not None and suite.get("tests") == "0" and list(suite) == []


# -- the terminal ---------------------------------------------------------------------------------------


def on_a_terminal(argv: list[str], env: dict[str, str]) -> str:
    """Run ``argv`` with a pseudo-terminal as its standard output and error; return what it wrote."""
    leader, follower = pty.openpty()
    proc = subprocess.Popen(argv, stdout=follower, stderr=follower, stdin=subprocess.DEVNULL, env=env)
    os.close(follower)
    chunks = []
    while True:
        ready, _, _ = select.select([leader], [], [], 60)
        if not ready:
            break
        try:
            data = os.read(leader, 4096)
        except OSError:  # the follower side closed
            break
        if not data:
            break
        chunks.append(data)
    proc.wait(timeout=60)
    os.close(leader)
    return b"".join(chunks).decode("utf-8", "replace")


def test_colour_on_a_terminal_and_none_with_no_color_or_a_pipe(outputs: dict[str, Path]) -> None:
    argv = [sys.executable, "-m", "verifier", "-C", str(outputs["repo"]), "check", str(outputs["head"]), "--no-notes"]
    env = {k: v for k, v in os.environ.items() if k != "NO_COLOR"} | {"PYTHONPATH": str(ROOT)}
    coloured = on_a_terminal(argv, env)
    assert "\033[32mPASS" in coloured
    assert "\033[" not in on_a_terminal(argv, {**env, "NO_COLOR": "1"})
    piped = subprocess.run(argv, capture_output=True, text=True, env=env)
    assert "PASS" in piped.stdout and "\033[" not in piped.stdout + piped.stderr


def test_quiet_prints_the_verdict_line_only_on_a_pass(outputs: dict[str, Path]) -> None:
    done = gate(outputs["repo"], str(outputs["head"]), "--quiet")
    assert done.stdout.splitlines() == ["PASS  the machine-written change is verified"]
    assert done.stderr == ""


def test_stage_display_redraws_one_line_on_a_terminal() -> None:
    leader, follower = pty.openpty()
    with os.fdopen(follower, "w") as stream:
        with StageDisplay(stream, interval=0.01) as display:
            display("reading the change")
            select.select([], [], [], 0.05)  # let the spinner draw a few frames
            display("running the tests")
        written = ""
        while select.select([leader], [], [], 0.5)[0]:
            written += os.read(leader, 65536).decode()
    os.close(leader)
    assert "\rverifier: reading the change" in written.replace("\033[2K", "")
    assert "running the tests" in written and written.count("done") == 2


def test_stage_display_prints_one_line_per_stage_when_piped(tmp_path: Path) -> None:
    target = tmp_path / "log"
    with target.open("w") as stream, StageDisplay(stream) as display:
        display("reading the change")
        display("running the tests")
    assert target.read_text() == "verifier: reading the change\nverifier: running the tests\n"
