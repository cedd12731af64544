"""The test harness: what runs inside the sandbox, and reading what it wrote back into a RunResult.

Inside the sandbox, pytest runs under coverage.py (line and branch) with a small plugin of ours that
records every test's node id and outcome and switches coverage.py's dynamic context to the node id of
the running test (``fixture:<name>`` while a fixture is set up), so that the coverage data says which
test executed which line. The plugin also keeps only the selected tests (and this shard's share of
them); the harness spreads the tests over pytest-xdist workers when asked, and runs failing tests again
to tell flaky ones from failing ones. Results are read from the files the harness writes (JSON-lines
results, JUnit XML, coverage JSON), never from the console.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from collections.abc import Mapping
from dataclasses import replace
from pathlib import Path
from typing import TYPE_CHECKING

from verifier.models import (
    INDEX,
    FileCoverage,
    Policy,
    RunResult,
    SandboxRequest,
    SandboxResult,
    Selection,
    TestOutcome,
)

if TYPE_CHECKING:
    from verifier.gitio import Git
    from verifier.sandbox import Backend

HARNESS_DIR = ".verifier-harness"
OUT_DIR = f"{HARNESS_DIR}/out"
RESULTS = f"{OUT_DIR}/results.jsonl"
JUNIT = f"{OUT_DIR}/junit.xml"
COVERAGE_JSON = f"{OUT_DIR}/coverage.json"
COVERAGE_DATA = f"{OUT_DIR}/coverage.sqlite"
STATUS = f"{OUT_DIR}/status.json"
RERUNS = f"{OUT_DIR}/reruns.jsonl"
SELECTED = f"{HARNESS_DIR}/selected.json"
COLLECTED = (RESULTS, JUNIT, COVERAGE_JSON, COVERAGE_DATA, STATUS, RERUNS)

_PYTEST_EXIT = {0: "ok", 1: "failed", 2: "interrupted", 3: "internal", 4: "usage", 5: "no-tests"}

# No ``dynamic_context``: the plugin switches contexts itself (coverage.py's Coverage.switch_context), which
# gives pytest node ids, parametrized ones included. The ctrace core supports dynamic contexts; sys.monitoring
# does not (coverage.py's docs on contexts and cores).
COVERAGERC = f"""\
[run]
branch = True
core = ctrace
relative_files = True
data_file = {COVERAGE_DATA}
source = .
omit = {HARNESS_DIR}/*
"""
# With pytest-xdist the tests run in worker processes: coverage.py (7.10+) measures them with
# ``patch = subprocess``, which also makes the data files parallel ones, joined by ``coverage combine``.
COVERAGERC_PARALLEL = COVERAGERC.replace("[run]\n", "[run]\npatch = subprocess\n", 1)

HARNESS = f"""\
# Written by verifier into the sandbox workspace; runs pytest under coverage and records the results.
import json, os, subprocess, sys
os.makedirs({OUT_DIR!r}, exist_ok=True)
here = os.path.abspath({HARNESS_DIR!r})
env = dict(os.environ, PYTHONPATH=os.pathsep.join([here, os.environ.get("PYTHONPATH", "")]))
settings = json.loads(sys.argv[1])

def can_spread():
    try:
        import coverage, xdist  # noqa: F401
    except ImportError:
        return False
    return tuple(int(part) for part in coverage.__version__.split(".")[:2]) >= (7, 10)

workers = int(settings.get("workers", 1))
spread = workers > 1 and can_spread()
rc = os.path.join(here, "coveragerc-parallel" if spread else "coveragerc")
pytest_args = ["-p", "verifier_results", "-p", "no:cacheprovider", "--rootdir=."]
pytest_rc = subprocess.call(
    [sys.executable, "-m", "coverage", "run", "--rcfile=" + rc, "-m", "pytest", *pytest_args,
     "--junitxml={JUNIT}", "-o", "junit_family=xunit2", *(["-n", str(workers)] if spread else []),
     *settings["args"]], env=env)
if spread:
    subprocess.call([sys.executable, "-m", "coverage", "combine", "--rcfile=" + rc, "-q"], env=env)
# coverage.py's own analysis (statements, missing, excluded) only of the files the gate judges: a report of
# every measured file costs seconds on a large suite. Which test ran what is read from the data file.
report_files = settings.get("report_files") or []
json_rc = None
if report_files:
    json_rc = subprocess.call(
        [sys.executable, "-m", "coverage", "json", "--rcfile=" + rc, "-q", "--include=" + ",".join(report_files),
         "-o", {COVERAGE_JSON!r}], env=env)

def failing(path, attempt):
    found = set()
    try:
        with open(path) as records:
            for line in records:
                record = json.loads(line)
                if record.get("kind") != "test" or record.get("attempt", 0) != attempt:
                    continue
                if record["outcome"] == "failed" and not record.get("xfail"):
                    found.add(record["nodeid"])
    except (OSError, ValueError):
        pass
    return sorted(found)

# Failing tests run again, without coverage and without the selection filter, one attempt at a time.
still = failing({RESULTS!r}, 0)
for attempt in range(1, int(settings.get("reruns", 0)) + 1):
    if not still:
        break
    rerun_env = dict(env, VERIFIER_RESULTS_FILE={RERUNS!r}, VERIFIER_ATTEMPT=str(attempt), VERIFIER_NO_FILTER="1")
    subprocess.call([sys.executable, "-m", "pytest", *pytest_args, *settings.get("policy_args", []), *still],
                    env=rerun_env)
    still = failing({RERUNS!r}, attempt)
with open({STATUS!r}, "w") as status:
    json.dump({{"pytest_exit": pytest_rc, "coverage_json_exit": json_rc, "spread": spread}}, status)
"""

PLUGIN = f"""\
# Written by verifier: records each test's node id and outcome, one JSON object per line; names the
# coverage context after the running test; keeps only the selected tests (and this shard's share).
import json, os
import pytest

_out = open(os.environ.get("VERIFIER_RESULTS_FILE", {RESULTS!r}), "a", buffering=1)
_attempt = int(os.environ.get("VERIFIER_ATTEMPT", "0"))
_worker = os.environ.get("PYTEST_XDIST_WORKER")  # set in pytest-xdist's workers; the controller reports
_contexts = []

def _load_filter():
    if os.environ.get("VERIFIER_NO_FILTER") or not os.path.exists({SELECTED!r}):
        return None
    with open({SELECTED!r}) as selected:
        return json.load(selected)

_filter = _load_filter()

def _coverage():
    try:
        import coverage
    except ImportError:
        return None
    return coverage.Coverage.current()

def _switch(label):
    cov = _coverage()
    if cov is not None:
        cov.switch_context(label)

def _write(record):
    _out.write(json.dumps(record) + "\\n")

def _text(report):
    try:
        return str(report.longrepr)[-2000:] if report.longrepr else ""
    except Exception:
        return ""

@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_protocol(item, nextitem):
    _contexts.append(item.nodeid)
    _switch(item.nodeid)
    yield
    _contexts.pop()
    _switch("")

@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_makereport(item, call):
    outcome = yield
    if call.when == "setup":  # travels with the report from an xdist worker to the controller
        outcome.get_result().verifier_fixtures = sorted(getattr(item, "fixturenames", ()))

@pytest.hookimpl(hookwrapper=True)
def pytest_fixture_setup(fixturedef, request):
    # A fixture's setup runs once for every test of its scope: its lines belong to all tests using it.
    label = "fixture:" + fixturedef.argname
    _contexts.append(label)
    _switch(label)
    yield
    _contexts.pop()
    _switch(_contexts[-1] if _contexts else "")

def pytest_collection_modifyitems(session, config, items):
    if _filter is None:
        return
    wanted, files = set(_filter.get("node_ids", ())), set(_filter.get("files", ()))
    root = os.getcwd()
    def chosen(item):
        return (_filter.get("whole_suite") or item.nodeid in wanted
                or os.path.relpath(str(item.path), root).replace(os.sep, "/") in files)
    keep = [item for item in items if chosen(item)]
    shard = _filter.get("shard")
    if shard:
        index, total = shard
        ordered = sorted(item.nodeid for item in keep)
        mine = set(ordered[index - 1::total])
        keep = [item for item in keep if item.nodeid in mine]
    kept = set(id(item) for item in keep)
    dropped = [item for item in items if id(item) not in kept]
    if dropped:
        config.hook.pytest_deselected(items=dropped)
        items[:] = keep
    if _worker in (None, "gw0"):  # every worker collects the same items
        _write({{"kind": "selection", "kept": len(keep), "deselected": len(dropped), "shard": shard}})

def pytest_collectreport(report):
    if report.failed and _worker is None:
        _write({{"kind": "collect", "nodeid": report.nodeid, "message": _text(report)}})

def pytest_runtest_logreport(report):
    if _worker is not None:
        return  # the controller writes the copy it receives
    _write({{"kind": "test", "nodeid": report.nodeid, "when": report.when,
        "outcome": report.outcome, "xfail": hasattr(report, "wasxfail"), "duration": report.duration,
        "attempt": _attempt, "fixtures": getattr(report, "verifier_fixtures", None),
        "message": _text(report) if report.outcome != "passed" else ""}})
"""

ENV_BASE = {"LANG": "C.UTF-8", "LC_ALL": "C.UTF-8", "PYTHONDONTWRITEBYTECODE": "1", "PYTHONHASHSEED": "0"}


def prepare(tree: Path, policy: Policy, selection: Selection, report_files: tuple[str, ...] = ()) -> SandboxRequest:
    """Write the harness into the materialised ``tree`` and describe the sandboxed run; coverage.py's
    statement analysis is reported for ``report_files`` (the files the gate judges)."""
    harness = tree / HARNESS_DIR
    if harness.exists():
        shutil.rmtree(harness)
    harness.mkdir()
    (harness / "harness.py").write_text(HARNESS)
    (harness / "verifier_results.py").write_text(PLUGIN)
    (harness / "coveragerc").write_text(COVERAGERC)
    (harness / "coveragerc-parallel").write_text(COVERAGERC_PARALLEL)
    if not selection.whole_suite or selection.shard:
        (harness / "selected.json").write_text(json.dumps(_filter(tree, selection)))
    targets = list(policy.test_paths) if selection.whole_suite else _test_files(tree, selection)
    settings = {
        "args": [*policy.pytest_args, *targets],
        "policy_args": list(policy.pytest_args),
        "workers": workers_for(policy, selection),
        "reruns": policy.selection.reruns,
        "report_files": list(report_files),
    }
    env = {**ENV_BASE, "PYTHONPATH": ":".join(policy.python_path)}
    return SandboxRequest(
        tree=str(tree),
        python_args=(f"{HARNESS_DIR}/harness.py", json.dumps(settings)),
        env=env,
        limits=policy.limits,
        collect=COLLECTED,
    )


# Fewer tests than this per worker do not repay a worker's start-up (an import of the suite and a collection).
TESTS_PER_WORKER = 25


def workers_for(policy: Policy, selection: Selection) -> int:
    """How many pytest-xdist workers to use: the policy's number, or with ``auto`` (0) one per core but
    no more than the tests to run repay; with no count known (no map), ``auto`` runs without xdist."""
    if policy.selection.workers:
        return policy.selection.workers
    if not selection.known_tests:
        return 1
    expected = selection.known_tests - selection.left_out
    return max(1, min(os.cpu_count() or 1, expected // TESTS_PER_WORKER))


def _filter(tree: Path, selection: Selection) -> dict:
    """What the plugin keeps: the selected node ids and whole files, and this shard's share of them."""
    return {
        "whole_suite": selection.whole_suite,
        "node_ids": sorted(selection.node_ids),
        "files": sorted(path for path in selection.files if (tree / path).is_file()),
        "shard": list(selection.shard) if selection.shard else None,
    }


def _test_files(tree: Path, selection: Selection) -> list[str]:
    """The files pytest is given: those of the selected tests that exist in ``tree``."""
    paths = {node_id.split("::", 1)[0] for node_id in selection.node_ids} | set(selection.files)
    return sorted(path for path in paths if (tree / path).is_file())


def run_revision(
    git: Git, revision: str, policy: Policy, selection: Selection, backend: Backend, report_files: tuple[str, ...] = ()
) -> SandboxResult:
    """Materialise ``revision`` (a commit, or INDEX) outside the repository and run its tests in ``backend``."""
    workdir = Path(tempfile.mkdtemp(prefix="verifier-tree-"))
    try:
        tree = workdir / "tree"
        if revision == INDEX:
            git.export_index(tree)
        else:
            git.export_commit(revision, tree)
        return backend.run(prepare(tree, policy, selection, report_files))
    finally:
        shutil.rmtree(workdir, ignore_errors=True)


def read_run(result: SandboxResult) -> RunResult:
    """Turn what the sandbox brought back into a RunResult, naming what went wrong when it did."""
    tests, collection_errors, selected = _read_results(result.files.get(RESULTS, b""))
    tests = _apply_reruns(tests, result.files.get(RERUNS, b""))
    status_file = _json(result.files.get(STATUS))
    pytest_exit = status_file.get("pytest_exit") if status_file else None
    coverage = _read_coverage(_json(result.files.get(COVERAGE_JSON)) or {}, result.files.get(COVERAGE_DATA))
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
    status = _status(result, pytest_exit, tests, collection_errors)
    if status == "no-tests" and _empty_shard(selected):
        status = "completed"  # this shard's share of the selection is empty; the other shards run the tests
    return RunResult(status=status, **common)


def _empty_shard(selected: dict | None) -> bool:
    return bool(selected and selected.get("shard") and selected.get("kept") == 0)


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


def _records(data: bytes) -> list[dict]:
    records = []
    for line in data.decode("utf-8", "replace").splitlines():
        try:
            record = json.loads(line)
        except ValueError:
            continue
        if isinstance(record, dict):
            records.append(record)
    return records


def _read_results(data: bytes) -> tuple[tuple[TestOutcome, ...], tuple[str, ...], dict | None]:
    """Fold the per-phase records into one outcome per test (setup/teardown failures are errors)."""
    phases: dict[str, list[dict]] = {}
    errors: list[str] = []
    selected = None
    for record in _records(data):
        if record.get("kind") == "collect":
            errors.append(f"{record.get('nodeid') or '<session>'}: {_last_line(record.get('message', ''))}")
        elif record.get("kind") == "test":
            phases.setdefault(record["nodeid"], []).append(record)
        elif record.get("kind") == "selection":
            selected = record
    return tuple(_fold(node_id, records) for node_id, records in phases.items()), tuple(errors), selected


def _apply_reruns(tests: tuple[TestOutcome, ...], data: bytes) -> tuple[TestOutcome, ...]:
    """A failing test that passed on a re-run is flaky; one that failed every time stays failing."""
    attempts: dict[str, dict[int, list[dict]]] = {}
    for record in _records(data):
        if record.get("kind") == "test":
            attempts.setdefault(record["nodeid"], {}).setdefault(int(record.get("attempt", 1)), []).append(record)
    folded = []
    for test in tests:
        runs = [_fold(test.node_id, records) for _attempt, records in sorted(attempts.get(test.node_id, {}).items())]
        if test.outcome in ("failed", "error") and runs:
            outcome = "flaky" if any(run.outcome == "passed" for run in runs) else test.outcome
            test = replace(test, outcome=outcome, attempts=1 + len(runs))
        folded.append(test)
    return tuple(folded)


def _fold(node_id: str, records: list[dict]) -> TestOutcome:
    duration = sum(float(r.get("duration") or 0) for r in records)
    fixtures = tuple(next((r["fixtures"] for r in records if r.get("fixtures")), ()))
    for record in records:
        if record["outcome"] == "failed":
            outcome = "failed" if record["when"] == "call" else "error"
            return TestOutcome(node_id, outcome, record.get("message", ""), duration, fixtures=fixtures)
    if any(r["outcome"] == "skipped" for r in records):
        return TestOutcome(node_id, "skipped", "", duration, fixtures=fixtures)
    return TestOutcome(node_id, "passed", "", duration, fixtures=fixtures)


def _last_line(message: str) -> str:
    lines = [line for line in message.strip().splitlines() if line.strip()]
    return lines[-1].strip() if lines else "no message"


def _read_coverage(report: Mapping, data_file: bytes | None) -> dict[str, FileCoverage]:
    """Executed lines and per-test contexts of every measured file (from coverage.py's data file), with
    statements, missing and excluded lines where coverage.py's JSON report analysed the file."""
    files = _read_coverage_data(data_file) if data_file else {}
    for path, data in (report.get("files") or {}).items():
        measured = files.get(path)
        files[path] = FileCoverage(
            path=path,
            executed=frozenset(data.get("executed_lines", ())),
            missing=frozenset(data.get("missing_lines", ())),
            excluded=frozenset(data.get("excluded_lines", ())),
            contexts=measured.contexts if measured else {},
        )
    return files


def _read_coverage_data(data_file: bytes) -> dict[str, FileCoverage]:
    from coverage import CoverageData

    with tempfile.TemporaryDirectory(prefix="verifier-coverage-") as folder:
        path = Path(folder) / "coverage.sqlite"
        path.write_bytes(data_file)
        data = CoverageData(basename=str(path))
        try:
            data.read()
            named = bool(data.measured_contexts() - {""})
            return {
                name: FileCoverage(
                    path=name,
                    executed=frozenset(data.lines(name) or ()),
                    missing=frozenset(),
                    contexts={line: tuple(c) for line, c in data.contexts_by_lineno(name).items()} if named else {},
                )
                for name in data.measured_files()
            }
        except Exception:  # a data file the tests damaged: the coverage rule then sees nothing executed
            return {}
