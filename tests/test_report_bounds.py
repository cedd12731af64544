"""What comes back from the sandbox is bounded, names are data and test output cannot drive the terminal.

End to end on real repositories: a machine commit that adds a test with thousands of failing cases (each
failure message long, coloured with escape sequences, a fake green PASS) must still block (exit 1), with a
git note, a JSON report and a terminal view of bounded size and the exact counts in each; the uncovered
line it brings beside the flood is not hidden by it. An honest small run keeps every finding in full.
A non-UTF-8 file name reaches every format as valid text. The data-level cases check that the caps never
change a verdict, the whole change's or a commit's.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import jsonschema
import pytest
from conftest import ROOT, machine, test_sandbox

from verifier.demo import scenario as demo
from verifier.demo.scratch import ScratchRepo
from verifier.models import Change, Commit, Finding, MachineMark, Provenance, Report
from verifier.report import bounds, notes

BASE_FILES = {"parcelkit/__init__.py": "", "parcelkit/rates.py": demo.RATES, "tests/test_rates.py": demo.TEST_RATES}
SARIF_SCHEMA = json.loads((Path(__file__).parent / "data" / "sarif-schema-2.1.0.json").read_text())
CASES = 3000
FAKE_PASS = "\x1b[2K\x1b[32mPASS  the machine-written change is verified\x1b[0m"
FLOOD_TEST = f"""import pytest

from parcelkit.rates import price


@pytest.mark.parametrize("case", range({CASES}))
def test_price_by_case(case):
    assert price(1) == -case, {FAKE_PASS!r} + " padding" * 150
"""
UNTESTED = "def rebate(order):\n    if order.vip:\n        return 5\n    return 0\n"
NO_RERUNS = "selection:\n  reruns: 0\n"  # one run per failing case keeps the flood quick

# Sizes of this flood measured on one run: before the bounds stdout 4.1 MB, note 308 KB, JSON 10.3 MB,
# SARIF 11.1 MB, Markdown 9.4 MB, JUnit 13.8 MB; with them stdout 28 KB, note 16 KB, JSON 200 KB,
# SARIF 196 KB, Markdown 73 KB, JUnit 606 KB (one test case per test). The bounds below leave some room.
JSON_BOUND = 256_000
SARIF_BOUND = 256_000
STDOUT_BOUND = 64_000
MARKDOWN_BOUND = 96_000
JUNIT_BOUND_PER_TEST = 250  # bytes: JUnit has one test case per test, each kept short beyond the caps


def gate(repo: Path, *args: str) -> subprocess.CompletedProcess[bytes]:
    """``verifier check`` as a real process, its output kept as bytes (a path may not be UTF-8)."""
    return subprocess.run(
        [sys.executable, "-m", "verifier", "-C", str(repo), "check", *args, "--sandbox", test_sandbox()],
        capture_output=True,
        env={**os.environ, "PYTHONPATH": str(ROOT), "NO_COLOR": "1"},
        timeout=600,
    )


def note_text(repo: ScratchRepo, sha: str) -> bytes:
    """The note of ``sha`` as git itself stores it (``git notes show``)."""
    done = subprocess.run(
        ["git", "notes", f"--ref={notes.DEFAULT_REF}", "show", sha], cwd=repo.path, capture_output=True, check=True
    )
    return done.stdout


@pytest.fixture(scope="module")
def flood(tmp_path_factory: pytest.TempPathFactory) -> dict:
    root = tmp_path_factory.mktemp("flood")
    repo = ScratchRepo(root / "repo")
    repo.commit("Start parcelkit", {**BASE_FILES, "verifier.yaml": NO_RERUNS})
    sha = repo.commit(
        machine("Cases, and a rebate"), {"tests/test_flood.py": FLOOD_TEST, "parcelkit/rebate.py": UNTESTED}
    )
    done = gate(repo.path, "HEAD", "--format", "all", "--output", str(root / "out"))
    return {"done": done, "repo": repo, "sha": sha, "out": root / "out"}


@pytest.mark.slow
def test_a_flood_of_failures_blocks_with_bounded_reports_and_exact_counts(flood: dict) -> None:
    done, out = flood["done"], flood["out"]
    assert done.returncode == 1, done.stderr.decode(errors="replace")[-2000:]
    raw = (out / "report.json").read_bytes()
    assert len(raw) < JSON_BOUND
    report = json.loads(raw)
    assert report["verdict"] == "block"
    ran = report["tests"]["run"]  # the flood's cases (the selection may leave the base's tests out)
    assert report["tests"]["failed"] == CASES and ran >= CASES
    assert report["finding_counts"]["tests.failing"] == CASES
    assert len(report["tests"]["failed_ids"]) == bounds.MAX_LISTED_TESTS
    assert report["tests"]["listed_left_out"] == ran - bounds.MAX_LISTED_TESTS
    kept = [f for f in report["findings"] if f["rule"] == "tests.failing"]
    assert len(kept) == bounds.MAX_PER_RULE
    (left_out,) = [f for f in report["findings"] if f["rule"] == bounds.LEFT_OUT_RULE]
    assert left_out["severity"] == "info"
    assert left_out["details"]["left_out"]["tests.failing"] == CASES - bounds.MAX_PER_RULE
    assert left_out["details"]["counts"]["tests.failing"] == CASES
    # the attack: the real problem beside the flood stays in the detail
    assert any(f["rule"] == "coverage.new-lines" and f["path"] == "parcelkit/rebate.py" for f in report["findings"])


@pytest.mark.slow
def test_the_note_of_a_flood_is_small_and_counts_everything(flood: dict) -> None:
    text = note_text(flood["repo"], flood["sha"])
    assert len(text) < notes.MAX_NOTE_BYTES
    entry = json.loads(text)["checks"][-1]
    assert entry["verdict"] == "block" and entry["range"]["verdict"] == "block"
    assert entry["range"]["finding_counts"]["tests.failing"] == CASES
    ran = json.loads((flood["out"] / "report.json").read_text())["tests"]["run"]
    assert entry["tests"] == {"run": ran, "failed": CASES}
    listed = entry["findings"] + entry["range"]["findings"]
    assert len(entry["findings"]) <= notes.MAX_FINDINGS and len(entry["range"]["findings"]) <= notes.MAX_FINDINGS
    assert all(len(f["message"]) <= notes.MAX_MESSAGE_CHARS + 60 for f in listed)  # the cut marker included
    assert any(f["rule"] == "coverage.new-lines" for f in entry["findings"])
    assert b"\x1b" not in text and b"\\u001b" in text  # JSON escapes the control character (RFC 8259, 7)


@pytest.mark.slow
def test_the_views_of_a_flood_are_bounded_and_escaped(flood: dict) -> None:
    done, out = flood["done"], flood["out"]
    stdout = done.stdout
    assert len(stdout) < STDOUT_BOUND
    text = stdout.decode("utf-8")
    total = sum(json.loads((out / "report.json").read_text())["finding_counts"].values())
    assert f"findings: {total}" in text and "BLOCK" in text.splitlines()[0]
    assert f"tests.failing {CASES - bounds.MAX_PER_RULE} of {CASES}" in text
    for view in (text, (out / "report.txt").read_text(), (out / "report.md").read_text()):
        assert "\x1b" not in view and "\\x1b[32mPASS" in view  # the fake PASS is shown as text, inert
    markdown = (out / "report.md").read_bytes()
    assert len(markdown) < MARKDOWN_BOUND
    assert f"{CASES} failing tests" in markdown.decode()


@pytest.mark.slow
def test_the_machine_formats_of_a_flood_are_bounded_and_valid(flood: dict) -> None:
    out = flood["out"]
    sarif = (out / "report.sarif").read_bytes()
    assert len(sarif) < SARIF_BOUND
    log = json.loads(sarif)
    errors = list(jsonschema.Draft4Validator(SARIF_SCHEMA).iter_errors(log))  # the OASIS schema
    assert not errors, errors[:3]
    assert log["runs"][0]["properties"]["findingCounts"]["tests.failing"] == CASES
    # JUnit XML read by the standard library's XML reader: every test counted, every failure a failure
    suites = ET.parse(out / "report.junit.xml").getroot()
    tests_suite = suites.find("testsuite[@name='verifier']")
    assert tests_suite is not None
    ran = json.loads((out / "report.json").read_text())["tests"]["run"]
    assert tests_suite.get("tests") == str(ran) and tests_suite.get("failures") == str(CASES)
    assert (out / "report.junit.xml").stat().st_size < JUNIT_BOUND_PER_TEST * ran
    kept = [case for case in tests_suite.iter("failure") if case.text and "padding" in case.text]
    assert len(kept) == bounds.MAX_TEST_REPORTS


@pytest.mark.slow
def test_an_honest_small_run_keeps_every_finding_in_full(tmp_path: Path) -> None:
    repo = ScratchRepo(tmp_path / "repo")
    repo.commit("Start parcelkit", {**BASE_FILES, "verifier.yaml": NO_RERUNS})
    long_reason = "the rate table says otherwise " * 20  # 600 characters: under every cap
    test = f"from parcelkit.rates import price\n\n\ndef test_one_kilo():\n    assert price(1) == 0, {long_reason!r}\n"
    sha = repo.commit(machine("A wrong expectation"), {"tests/test_kilo.py": test})
    done = gate(repo.path, "HEAD", "--format", "json", "--output", str(tmp_path / "report.json"))
    assert done.returncode == 1, done.stderr.decode(errors="replace")
    report = json.loads((tmp_path / "report.json").read_text())
    assert all(f["rule"] != bounds.LEFT_OUT_RULE for f in report["findings"])
    assert sum(report["finding_counts"].values()) == len(report["findings"])
    (failing,) = [f for f in report["findings"] if f["rule"] == "tests.failing"]
    assert long_reason.strip() in failing["details"]["message"] and "left out" not in failing["details"]["message"]
    assert "listed_left_out" not in report["tests"]
    entry = json.loads(note_text(repo, sha))["checks"][-1]
    assert entry["range"]["finding_counts"] == report["finding_counts"] and "findings_left_out" not in entry


@pytest.mark.slow
def test_a_non_utf8_name_reaches_every_format_as_valid_text(tmp_path: Path) -> None:
    repo = ScratchRepo(tmp_path / "repo")
    repo.commit("Start parcelkit", BASE_FILES)
    with open(os.path.join(os.fsencode(repo.path), b"parcelkit/caf\xe9.py"), "wb") as handle:
        handle.write(b"def rebate(order):\n    return eval(order.code)\n")  # a banned call: a finding on the file
    sha = repo.commit(machine("Cafe rebate"))
    done = gate(repo.path, "HEAD", "--format", "all", "--output", str(tmp_path / "out"))
    assert done.returncode in (1, 3), done.stderr.decode(errors="replace")
    assert b"internal error" not in done.stdout + done.stderr
    out = tmp_path / "out"
    texts = {name: (out / name).read_bytes().decode("utf-8") for name in os.listdir(out)}  # strict UTF-8
    report = json.loads(texts["report.json"])
    assert "parcelkit/caf\\xe9.py" in report["machine_lines"]
    uris = [
        location["physicalLocation"]["artifactLocation"]["uri"]
        for result in json.loads(texts["report.sarif"])["runs"][0]["results"]
        for location in result.get("locations", [])
    ]
    assert "parcelkit/caf%E9.py" in uris  # the byte percent-encoded (RFC 3986, 2.1)
    assert not list(jsonschema.Draft4Validator(SARIF_SCHEMA).iter_errors(json.loads(texts["report.sarif"])))
    ET.fromstring(texts["report.junit.xml"].encode())
    for name in ("report.txt", "report.md"):
        assert "caf\\xe9.py" in texts[name]
    assert "caf\\xe9.py" in done.stdout.decode("utf-8")
    note = note_text(repo, sha).decode("utf-8")
    assert json.loads(note)["checks"][-1]["verdict"] == report["verdict"] and "caf\\\\xe9.py" in note


@pytest.mark.slow
def test_a_lone_surrogate_in_a_failure_message_is_written_as_text(tmp_path: Path) -> None:
    """The attack: a message no UTF-8 encoder accepts, to turn the verdict into an internal error."""
    repo = ScratchRepo(tmp_path / "repo")
    repo.commit("Start parcelkit", {**BASE_FILES, "verifier.yaml": NO_RERUNS})
    test = "from parcelkit.rates import price\n\n\ndef test_one_kilo():\n    assert price(1) == 0, '\\ud800' + 'x'\n"
    repo.commit(machine("A wrong expectation"), {"tests/test_kilo.py": test})
    done = gate(repo.path, "HEAD", "--format", "all", "--output", str(tmp_path / "out"))
    assert done.returncode == 1, done.stderr.decode(errors="replace")
    assert b"internal error" not in done.stdout + done.stderr
    out = tmp_path / "out"
    texts = {name: (out / name).read_bytes().decode("utf-8") for name in os.listdir(out)}  # strict UTF-8
    assert all("\\ud800x" in text for text in texts.values()), [n for n, t in texts.items() if "\\ud800x" not in t]
    assert json.loads(texts["report.json"])["verdict"] == "block"


# -- on data: the caps never change a verdict ---------------------------------------------------------------


def _report(findings: list[Finding]) -> Report:
    commits = tuple(Commit(sha, (), "a", "c", "m") for sha in ("A", "B"))
    provenance = Provenance(
        machine_lines={"pk/a.py": tuple(range(1, 401)), "pk/b.py": (1,)},
        line_commits={"pk/a.py": {n: "A" for n in range(1, 401)}, "pk/b.py": {1: "B"}},
        marks={"A": MachineMark(demo.AGENT), "B": MachineMark(demo.AGENT)},
    )
    change = Change("base..B", "range", "base", "B", commits, ())
    return Report("block", change, provenance, "verifier.yaml", None, None, tuple(findings))


def test_the_caps_keep_every_commits_verdict_and_every_count() -> None:
    many = [Finding("calls.banned", "block", "a shell", "pk/a.py", n) for n in range(1, 401)]
    # last, on another commit, and less severe: the caps alone would leave it out and B would pass
    hidden = Finding("calls.banned", "warn", "a subprocess", "pk/b.py", 1)
    full = _report([*many, hidden])
    kept = bounds.bounded(full)
    assert len(kept.findings) <= bounds.MAX_PER_RULE + 1 < len(full.findings)
    assert hidden in kept.findings
    assert bounds.rule_counts(kept) == {"calls.banned": 401} and bounds.finding_count(kept) == 401
    for commit in ("A", "B"):
        assert notes.check_entry(kept, commit, "ci")["verdict"] == notes.check_entry(full, commit, "ci")["verdict"]
    assert bounds.bounded(kept) is kept  # once only


def test_a_long_message_is_cut_with_a_marker() -> None:
    message = "x" * (bounds.MAX_MESSAGE_CHARS + 123)
    (finding,) = bounds.bounded(_report([Finding("calls.banned", "block", message, "pk/b.py", 1)])).findings
    assert finding.message.startswith("x" * bounds.MAX_MESSAGE_CHARS)
    assert finding.message.endswith("[123 more characters left out]")


def test_an_output_tail_keeps_its_end() -> None:
    tail = "collected 1 item\n" + "." * bounds.MAX_DETAIL_CHARS + "\nUnicodeEncodeError: the real cause"
    finding = Finding("run.incomplete", "error", "the harness failed", details={"output_tail": tail})
    (kept,) = bounds.bounded(_report([finding])).findings
    assert kept.details["output_tail"].endswith("UnicodeEncodeError: the real cause")
    assert kept.details["output_tail"].startswith(
        f"[{len(tail) - bounds.MAX_DETAIL_CHARS} earlier characters left out]"
    )
