"""The test harness: what runs inside the sandbox, and reading what it wrote back into a RunResult.

Inside the sandbox, pytest runs under coverage.py (line and branch, with per-test contexts) with a
small plugin of ours that records every test's node id and outcome. Results are read from the files
the harness writes (a JSON-lines results file, JUnit XML, coverage JSON), never from the console.
"""

from __future__ import annotations

import json
import shutil
from collections.abc import Mapping
from pathlib import Path

from verifier.models import FileCoverage, Policy, RunResult, SandboxRequest, SandboxResult, Selection, TestOutcome

HARNESS_DIR = ".verifier-harness"
OUT_DIR = f"{HARNESS_DIR}/out"
RESULTS = f"{OUT_DIR}/results.jsonl"
JUNIT = f"{OUT_DIR}/junit.xml"
COVERAGE_JSON = f"{OUT_DIR}/coverage.json"
COVERAGE_DATA = f"{OUT_DIR}/coverage.sqlite"
STATUS = f"{OUT_DIR}/status.json"
COLLECTED = (RESULTS, JUNIT, COVERAGE_JSON, COVERAGE_DATA, STATUS)

_PYTEST_EXIT = {0: "ok", 1: "failed", 2: "interrupted", 3: "internal", 4: "usage", 5: "no-tests"}

COVERAGERC = f"""\
[run]
branch = True
dynamic_context = test_function
relative_files = True
data_file = {COVERAGE_DATA}
source = .
omit = {HARNESS_DIR}/*

[json]
show_contexts = True
"""

HARNESS = f"""\
# Written by verifier into the sandbox workspace; runs pytest under coverage and records the results.
import json, os, subprocess, sys
os.makedirs({OUT_DIR!r}, exist_ok=True)
here = os.path.abspath({HARNESS_DIR!r})
env = dict(os.environ, PYTHONPATH=os.pathsep.join([here, os.environ.get("PYTHONPATH", "")]))
rc = os.path.join(here, "coveragerc")
test_args = json.loads(sys.argv[1])
pytest_rc = subprocess.call(
    [sys.executable, "-m", "coverage", "run", "--rcfile=" + rc, "-m", "pytest", "-p", "verifier_results",
     "-p", "no:cacheprovider", "--junitxml={JUNIT}", "-o", "junit_family=xunit2", *test_args], env=env)
json_rc = subprocess.call(
    [sys.executable, "-m", "coverage", "json", "--rcfile=" + rc, "-q", "-o", {COVERAGE_JSON!r}], env=env)
with open({STATUS!r}, "w") as status:
    json.dump({{"pytest_exit": pytest_rc, "coverage_json_exit": json_rc}}, status)
"""

PLUGIN = f"""\
# Written by verifier: records each test's node id and outcome, one JSON object per line.
import json
_out = open({RESULTS!r}, "a", buffering=1)

def _text(report):
    try:
        return str(report.longrepr)[-2000:] if report.longrepr else ""
    except Exception:
        return ""

def pytest_collectreport(report):
    if report.failed:
        _out.write(json.dumps({{"kind": "collect", "nodeid": report.nodeid, "message": _text(report)}}) + "\\n")

def pytest_runtest_logreport(report):
    _out.write(json.dumps({{"kind": "test", "nodeid": report.nodeid, "when": report.when,
        "outcome": report.outcome, "xfail": hasattr(report, "wasxfail"), "duration": report.duration,
        "message": _text(report) if report.outcome != "passed" else ""}}) + "\\n")
"""

ENV_BASE = {"LANG": "C.UTF-8", "LC_ALL": "C.UTF-8", "PYTHONDONTWRITEBYTECODE": "1", "PYTHONHASHSEED": "0"}


def prepare(tree: Path, policy: Policy, selection: Selection) -> SandboxRequest:
    """Write the harness into the materialised ``tree`` and describe the sandboxed run."""
    harness = tree / HARNESS_DIR
    if harness.exists():
        shutil.rmtree(harness)
    harness.mkdir()
    (harness / "harness.py").write_text(HARNESS)
    (harness / "verifier_results.py").write_text(PLUGIN)
    (harness / "coveragerc").write_text(COVERAGERC)
    test_args = [*policy.pytest_args, *(selection.node_ids if not selection.whole_suite else policy.test_paths)]
    env = {**ENV_BASE, "PYTHONPATH": ":".join(policy.python_path)}
    return SandboxRequest(
        tree=str(tree),
        python_args=(f"{HARNESS_DIR}/harness.py", json.dumps(test_args)),
        env=env,
        limits=policy.limits,
        collect=COLLECTED,
    )


def read_run(result: SandboxResult) -> RunResult:
    """Turn what the sandbox brought back into a RunResult, naming what went wrong when it did."""
    tests, collection_errors = _read_results(result.files.get(RESULTS, b""))
    status_file = _json(result.files.get(STATUS))
    pytest_exit = status_file.get("pytest_exit") if status_file else None
    coverage = _read_coverage(_json(result.files.get(COVERAGE_JSON)) or {})
    common = {
        "backend": result.backend,
        "isolation": result.isolation,
        "pytest_exit": pytest_exit,
        "tests": tests,
        "coverage": coverage,
        "collection_errors": collection_errors,
        "output_tail": result.output[-8000:],
        "wall_seconds": result.wall_seconds,
        "limit_hit": result.limit_hit,
    }
    return RunResult(status=_status(result, pytest_exit, tests, collection_errors), **common)


def _status(
    result: SandboxResult, pytest_exit: int | None, tests: tuple[TestOutcome, ...], errors: tuple[str, ...]
) -> str:
    if result.timed_out or result.limit_hit == "wall":
        return "timeout"
    if pytest_exit is None:
        return "crashed"
    if errors or pytest_exit == 2:
        return "collection-error" if errors else "crashed"
    if pytest_exit == 5 or not tests:
        return "no-tests"
    if pytest_exit in (3, 4):
        return "harness-error"
    return "completed"


def _json(data: bytes | None) -> dict | None:
    if not data:
        return None
    try:
        value = json.loads(data)
    except ValueError:
        return None
    return value if isinstance(value, dict) else None


def _read_results(data: bytes) -> tuple[tuple[TestOutcome, ...], tuple[str, ...]]:
    """Fold the per-phase records into one outcome per test (setup/teardown failures are errors)."""
    phases: dict[str, list[dict]] = {}
    errors: list[str] = []
    for line in data.decode("utf-8", "replace").splitlines():
        try:
            record = json.loads(line)
        except ValueError:
            continue
        if record.get("kind") == "collect":
            errors.append(f"{record.get('nodeid') or '<session>'}: {_last_line(record.get('message', ''))}")
        elif record.get("kind") == "test":
            phases.setdefault(record["nodeid"], []).append(record)
    return tuple(_fold(node_id, records) for node_id, records in phases.items()), tuple(errors)


def _fold(node_id: str, records: list[dict]) -> TestOutcome:
    duration = sum(float(r.get("duration") or 0) for r in records)
    for record in records:
        if record["outcome"] == "failed":
            outcome = "failed" if record["when"] == "call" else "error"
            return TestOutcome(node_id, outcome, record.get("message", ""), duration)
    if any(r["outcome"] == "skipped" for r in records):
        return TestOutcome(node_id, "skipped", "", duration)
    return TestOutcome(node_id, "passed", "", duration)


def _last_line(message: str) -> str:
    lines = [line for line in message.strip().splitlines() if line.strip()]
    return lines[-1].strip() if lines else "no message"


def _read_coverage(report: Mapping) -> dict[str, FileCoverage]:
    files: dict[str, FileCoverage] = {}
    for path, data in (report.get("files") or {}).items():
        contexts = {int(line): tuple(names) for line, names in (data.get("contexts") or {}).items()}
        files[path] = FileCoverage(
            path=path,
            executed=frozenset(data.get("executed_lines", ())),
            missing=frozenset(data.get("missing_lines", ())),
            excluded=frozenset(data.get("excluded_lines", ())),
            contexts=contexts,
        )
    return files
