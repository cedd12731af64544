"""The test harness on the host: putting the in-sandbox harness into a tree, and reading what it sealed.

The harness that runs inside the sandbox is ordinary code of this package (:mod:`verifier.testrun.inside`:
a supervisor, the pytest session it starts, and a pytest plugin). :func:`prepare` copies those files
into the materialised tree, under a folder named with a random token (``.verifier-<token>``), with a
JSON settings file beside them (the arguments, the selection filter, the key that seals the results)
and coverage.py's rc file. The sandbox starts the supervisor with Python's isolated mode (``-I``).

What comes back is one sealed file. :func:`read_run` checks the seal with the key kept on the host,
cross-checks the records (:mod:`verifier.testrun.integrity`) and validates the coverage export; the
statements, exclusions and branches of the judged files are computed here from the committed source
(:mod:`verifier.testrun.measure`), never taken from the sandbox. A run that fails any check is a
``harness-error`` with its problems named: the gate cannot verify, never a pass.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import secrets
import shutil
import sys
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

from verifier.models import (
    FileCoverage,
    Policy,
    RunResult,
    RunStatus,
    SandboxRequest,
    SandboxResult,
    Selection,
    TestOutcome,
    TestProgress,
)
from verifier.pathglob import pytest_collects_file
from verifier.testrun import integrity

if TYPE_CHECKING:
    from verifier.gitio import Git
    from verifier.sandbox import Backend
    from verifier.testrun.measure import SourceAnalysis

INSIDE = Path(__file__).resolve().parent / "inside"
INSIDE_FILES = ("supervisor.py", "session.py", "recorder.py")  # copied into the sandbox
FOLDER_PREFIX = ".verifier-"
SEALED = "out/sealed.json"

# No ``dynamic_context``: the plugin switches contexts itself (coverage.py's Coverage.switch_context), which
# gives pytest node ids, parametrized ones included. The ctrace core supports dynamic contexts; sys.monitoring
# does not (coverage.py's docs on contexts and cores). ``include_namespace_packages`` makes coverage.py record
# the never-imported files of folders without ``__init__.py`` too (coverage.py docs, [report] section).
COVERAGERC = """\
[run]
branch = True
core = ctrace
relative_files = True
source = .
omit = {folder}/*
{patch}
[report]
include_namespace_packages = True
"""
# With pytest-xdist the tests run in worker processes: coverage.py (7.10+) measures them with
# ``patch = subprocess``, which also makes the data files parallel ones, joined by the session.
PARALLEL_PATCH = "patch = subprocess\n"

ENV_BASE = {"LANG": "C.UTF-8", "LC_ALL": "C.UTF-8", "PYTHONDONTWRITEBYTECODE": "1", "PYTHONHASHSEED": "0"}
# Fewer tests than this per worker do not repay a worker's start-up (an import of the suite and a collection).
TESTS_PER_WORKER = 25


def harness_digest() -> str:
    """The hash of the in-sandbox harness (its files and the rc template): part of every cache key."""
    digest = hashlib.sha256(COVERAGERC.encode())
    for name in INSIDE_FILES:
        digest.update(name.encode() + b"\0" + (INSIDE / name).read_bytes())
    return digest.hexdigest()


@dataclass(frozen=True)
class Prepared:
    """A tree with the harness in it: the request for the sandbox, and what only the host keeps."""

    request: SandboxRequest
    key: bytes
    folder: str  # the harness folder's name in the workspace
    analyses: Mapping[str, SourceAnalysis | None] = field(default_factory=dict)  # judged file -> host analysis
    known: frozenset[str] = frozenset()  # the tree's Python files: the only paths coverage data may name
    progress_token: str | None = None  # marks the supervisor's progress lines in the output


@dataclass(frozen=True)
class HarnessRun:
    """A finished sandboxed run and the host's secrets needed to read it."""

    result: SandboxResult
    key: bytes
    folder: str
    analyses: Mapping[str, SourceAnalysis | None] = field(default_factory=dict)
    judged: tuple[str, ...] = ()
    known: frozenset[str] | None = None  # None: any path inside the workspace
    progress_token: str | None = None


def prepare(
    tree: Path,
    policy: Policy,
    selection: Selection,
    report_files: tuple[str, ...] = (),
    on_test: TestProgress | None = None,
) -> Prepared:
    """Copy the harness into the materialised ``tree`` and describe the sandboxed run; the judged files
    (``report_files``) are analysed here, from the committed source, before anything runs. With
    ``on_test``, the supervisor streams per-test progress, which reaches ``on_test`` as the run goes."""
    from verifier.testrun.measure import analyse_source

    analyses = {path: _analyse(tree, path, analyse_source) for path in report_files}
    known = python_files(tree)
    token = secrets.token_hex(8)
    folder = f"{FOLDER_PREFIX}{token}"
    plugin = f"verifier_recorder_{token}"
    target = tree / folder
    target.mkdir()
    for name in INSIDE_FILES:
        shutil.copyfile(INSIDE / name, target / name)
    os.replace(target / "recorder.py", target / f"{plugin}.py")
    (target / "coveragerc").write_text(COVERAGERC.format(folder=folder, patch=""))
    (target / "coveragerc-parallel").write_text(COVERAGERC.format(folder=folder, patch=PARALLEL_PATCH))
    key = secrets.token_bytes(32)
    progress_token = f"verifier-progress-{secrets.token_hex(8)}" if on_test else None
    targets = _policy_targets(tree, policy) if selection.whole_suite else _test_files(tree, selection)
    settings = {
        "key": key.hex(),
        "plugin": plugin,
        "path": list(policy.python_path),
        "modules": tree_modules(tree, policy.python_path),
        # the tree's test folders go after the installed packages too (pytest docs: import modes)
        "args": ["-p", plugin, "-p", "no:cacheprovider", "--rootdir=.", "--import-mode=append"],
        "targets": [*policy.pytest_args, *targets],
        "selection": _filter(tree, selection) if not selection.whole_suite or selection.shard else None,
        "workers": workers_for(policy, selection, estimated_tests(tree, known) if selection.whole_suite else 0),
        "reruns": policy.selection.reruns,
        "measure": True,
        "progress": progress_token,
    }
    (target / "settings.json").write_text(json.dumps(settings))
    request = SandboxRequest(
        tree=str(tree),
        python_args=("-I", f"{folder}/supervisor.py", folder),
        env=dict(ENV_BASE),
        limits=policy.limits,
        collect=(f"{folder}/{SEALED}",),
        on_output=ProgressReader(progress_token, on_test).feed if progress_token and on_test else None,
    )
    return Prepared(request, key, folder, analyses, known, progress_token)


def _policy_targets(tree: Path, policy: Policy) -> list[str]:
    """The policy's ``tests.paths``, each checked to exist in the tree: pytest would stop on a missing one
    with its own console ("file or directory not found") and the run could not be judged."""
    missing = [path for path in policy.test_paths if not (tree / path.split("::", 1)[0]).exists()]
    if missing:
        from verifier.errors import CannotVerify

        shown = ", ".join(repr(path[:200]) for path in missing[:5])
        raise CannotVerify(
            f"the policy's tests.paths names {shown}, which the tree under test does not have "
            f"(policy {policy.source}), so no test could be collected there",
            hint="point tests.paths at folders or files that hold the tests (paths from the repository root), "
            "or leave it empty for pytest's own discovery; a human changes it in the trusted policy",
        )
    return list(policy.test_paths)


class ProgressReader:
    """Finds the supervisor's progress lines (``<token> <done> <total> <node id>``) in the output as it
    arrives and hands them to a display. Sandbox output is untrusted: the numbers are only shown."""

    LINE_CAP = 4096  # bytes of one unfinished progress line kept; a longer one is no progress line

    def __init__(self, token: str, on_test: TestProgress) -> None:
        self.marker = token.encode() + b" "
        self.on_test = on_test
        self.pending = b""

    def feed(self, chunk: bytes) -> None:
        self.pending += chunk
        while True:
            start = self.pending.find(self.marker)
            if start < 0:
                self.pending = self.pending[-len(self.marker) :]
                return
            end = self.pending.find(b"\n", start)
            if end < 0:
                self.pending = self.pending[start:] if len(self.pending) - start <= self.LINE_CAP else b""
                return
            self._line(self.pending[start + len(self.marker) : end].decode("utf-8", "replace"))
            self.pending = self.pending[end + 1 :]

    def _line(self, text: str) -> None:
        done, _, rest = text.partition(" ")
        total, _, test = rest.partition(" ")
        if done.isdigit() and total.isdigit():
            self.on_test(int(done), int(total), test[:200])


def without_progress(output: str, token: str | None) -> str:
    """The output as the tests wrote it: the supervisor's progress lines taken out."""
    return output if token is None else re.sub(f"{re.escape(token)} [^\n]*\n", "", output)


def tree_modules(tree: Path, folders: tuple[str, ...]) -> list[str]:
    """The top-level modules and packages the tree offers on its import path (standard-library names left
    out: they cannot be imported from a tree, and ``config.harness`` reports a machine-written one). The
    session checks that each one it would import comes from the workspace, not from an installed copy.
    The tools' own names are left out too: the harness keeps them first by design (``config.harness``
    reports a machine-written module of that name)."""
    from verifier.rules.harness import TOOL_MODULES

    names: set[str] = set()
    for folder in folders:
        base = tree / folder
        if not base.is_dir() or base.is_symlink():
            continue
        for entry in base.iterdir():
            if entry.suffix == ".py" and entry.is_file():
                names.add(entry.stem)
            elif entry.is_dir() and (entry / "__init__.py").is_file():
                names.add(entry.name)
    skipped = sys.stdlib_module_names | TOOL_MODULES | {"conftest"}
    return sorted(name for name in names if name.isidentifier() and name not in skipped)


def python_files(tree: Path) -> frozenset[str]:
    """The committed tree's Python files (workspace-relative, links not followed)."""
    found = set()
    for folder, _dirs, files in os.walk(tree):
        relative = os.path.relpath(folder, tree).replace(os.sep, "/")
        found |= {name if relative == "." else f"{relative}/{name}" for name in files if name.endswith(".py")}
    return frozenset(found)


def _analyse(tree: Path, path: str, analyse: Any) -> SourceAnalysis | None:
    try:
        source = (tree / path).read_bytes().decode("utf-8", "replace")
    except OSError:
        return None
    return analyse(source)


def workers_for(policy: Policy, selection: Selection, estimate: int = 0) -> int:
    """How many pytest-xdist workers to use: the policy's number, or with ``auto`` (0) one per core but
    no more than the tests to run repay. The count is the map's when there is one, else ``estimate`` (the
    test functions of a whole-suite run, counted in the source); with neither, no xdist."""
    if policy.selection.workers:
        return policy.selection.workers
    expected = selection.known_tests - selection.left_out if selection.known_tests else estimate
    if not expected:
        return 1
    return max(1, min(os.cpu_count() or 1, expected // TESTS_PER_WORKER))


_TEST_FUNCTION = re.compile(rb"^[ \t]*(?:async[ \t]+)?def[ \t]+test", re.MULTILINE)


def estimated_tests(tree: Path, files: frozenset[str]) -> int:
    """The test functions defined in the tree's test modules (pytest's default ``test_*.py`` and
    ``*_test.py``): enough to tell whether a whole-suite run repays starting workers (parametrized cases
    and subtests only make it more)."""
    total = 0
    for path in filter(pytest_collects_file, files):
        try:
            total += len(_TEST_FUNCTION.findall((tree / path).read_bytes()[:2_000_000]))
        except OSError:
            continue
    return total


def _filter(tree: Path, selection: Selection) -> dict[str, Any]:
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
    git: Git,
    revision: str,
    policy: Policy,
    selection: Selection,
    backend: Backend,
    report_files: tuple[str, ...] = (),
    on_test: TestProgress | None = None,
) -> HarnessRun:
    """Materialise ``revision`` (a commit, or INDEX) outside the repository and run its tests in ``backend``
    (``on_test``: per-test progress, for a display)."""
    with git.exported(revision, "tree") as tree:
        prepared = prepare(tree, policy, selection, report_files, on_test)
        result = backend.run(prepared.request)
    return HarnessRun(
        result,
        prepared.key,
        prepared.folder,
        prepared.analyses,
        tuple(report_files),
        prepared.known,
        prepared.progress_token,
    )


# -- reading the run -----------------------------------------------------------------------------------


def read_run(run: HarnessRun) -> RunResult:
    """Turn what the sandbox brought back into a RunResult, naming what went wrong when it did."""
    result = run.result
    common: dict[str, Any] = {
        "backend": result.backend,
        "isolation": result.isolation,
        "output_tail": without_progress(result.output, run.progress_token)[-8000:],
        "wall_seconds": result.wall_seconds,
        "limit_hit": result.limit_hit,
    }
    if result.timed_out or result.limit_hit == "wall":
        return RunResult(status="timeout", pytest_exit=None, tests=(), coverage={}, **common)
    sealed = result.files.get(f"{run.folder}/{SEALED}")
    body, problem = integrity.open_seal(sealed, run.key)
    if body is None:
        status: RunStatus = "crashed" if not sealed else "harness-error"  # no file: the supervisor never finished
        return RunResult(status=status, pytest_exit=None, tests=(), coverage={}, problems=(str(problem),), **common)
    reading = integrity.read_session(body.get("run"))
    tests = _with_reruns(reading.tests, integrity.read_reruns(body.get("reruns")))
    coverage, coverage_problems = _coverage(body, run)
    problems = list(reading.problems)
    status = _status(reading)
    if status == "completed":
        problems += coverage_problems
    if problems and status == "completed":
        status = "harness-error"
    return RunResult(
        status=status,
        pytest_exit=reading.exit_code,
        tests=tests,
        coverage=coverage,
        collection_errors=reading.collection_errors,
        problems=tuple(problems),
        skipped_modules=dict(reading.skipped_modules),
        **common,
    )


def _status(reading: integrity.SessionReading) -> RunStatus:
    if reading.exit_code is None:
        return "crashed" if not reading.problems else "harness-error"
    if reading.collection_errors or reading.exit_code == 2:
        return "collection-error" if reading.collection_errors else "crashed"
    if reading.exit_code == integrity.NO_TESTS:
        return "completed" if _empty_shard(reading) or _all_skipped(reading) else "no-tests"
    if reading.exit_code not in integrity.RAN:
        return "harness-error"
    if not reading.tests:
        return "completed" if _empty_shard(reading) or _all_skipped(reading) else "no-tests"
    return "completed"


def _empty_shard(reading: integrity.SessionReading) -> bool:
    """This shard's share of the selection is empty; the other shards run the tests."""
    return bool(reading.shard) and reading.collected == 0 and not reading.problems


def _all_skipped(reading: integrity.SessionReading) -> bool:
    """Every file the session collected skipped itself at module level: the run is complete, and the test
    census (``tests.lost``) judges the tests those skips hide."""
    return bool(reading.skipped_modules) and reading.collected == 0 and not reading.problems


def _with_reruns(tests: tuple[TestOutcome, ...], reruns: integrity.Reruns) -> tuple[TestOutcome, ...]:
    """A failing test that passed on a (trustworthy) re-run is flaky; one that failed every time stays failing."""
    folded = []
    for test in tests:
        if test.outcome in ("failed", "error") and test.node_id in reruns.attempts:
            outcome = "flaky" if test.node_id in reruns.passed else test.outcome
            test = replace(test, outcome=outcome, attempts=reruns.attempts[test.node_id])
        folded.append(test)
    return tuple(folded)


def _coverage(body: Mapping[str, Any], run: HarnessRun) -> tuple[dict[str, FileCoverage], list[str]]:
    """Validated executed lines of every measured file; the judged files judged against host analysis."""
    from verifier.testrun.measure import ExportError, judge_file, read_export

    if body.get("coverage") is None:
        return {}, [f"no coverage data: {str(body.get('coverage_problem') or 'not measured')[:300]}"]
    try:
        executed = read_export(body["coverage"])
        if run.known is not None:  # a file the tests wrote at run time is no committed source: not trusted
            executed = {path: data for path, data in executed.items() if path in run.known}
        files = {
            path: FileCoverage(path=path, executed=data.lines, missing=frozenset(), contexts=dict(data.contexts))
            for path, data in executed.items()
        }
        problems = []
        for path in run.judged:
            analysis = run.analyses.get(path)
            if path not in executed:
                problems.append(f"{path}: the coverage data has no record of this judged file")
            elif analysis is not None:
                files[path] = judge_file(path, analysis, executed[path])
    except ExportError as error:
        return {}, [f"the coverage export is malformed: {error}"]
    return files, problems
