"""The mutation stage on the host: plan the mutants, run them in the sandbox, read back validated outcomes.

After a completed test run, every executable machine-written line of non-test code gets a few mutants
(:mod:`verifier.mutation.plan`). Each mutant is run against the tests that executed its line (the
per-test coverage contexts of the run; a fixture's context stands for every test that used it; a
module-level line, which runs at import, for every passing test). The runner
(``inside/runner.py``) is copied into a fresh copy of the head tree and started through the same
sandbox backend as the tests. What it writes back is untrusted: one capped file of JSON lines, each
record checked against the plan.

Outcomes are cached by content under ``<git common dir>/verifier/cache/mutants/``: the key holds the
head tree (the mutated file and the tests are in it), the environment (interpreter, packages, sandbox,
the runner itself) and the mutant, so re-checking an unchanged commit runs nothing. Safe to delete.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import tempfile
import time
from collections.abc import Callable, Iterable, Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

from verifier.models import (
    INDEX,
    Change,
    Mutant,
    MutantOutcome,
    MutationResult,
    Policy,
    Provenance,
    RunResult,
    SandboxRequest,
)
from verifier.mutation.counts import RULE_ID
from verifier.words import counted

if TYPE_CHECKING:
    from verifier.gitio import Git
    from verifier.sandbox import Backend

RUNNER = Path(__file__).parent / "inside" / "runner.py"
WORK_DIR = ".verifier-mutation"
RESULTS = f"{WORK_DIR}/out/results.jsonl"
RESULTS_CAP = 2 << 20  # bytes of results read back; a larger file is refused
FORK_FLOOR_SECONDS = 5.0  # the least time a forked mutant gets (a loaded machine runs slower than the run did)
FRESH_FLOOR_SECONDS = 20.0  # a fresh interpreter also starts, imports and collects
TIME_FACTOR = 5.0  # times the tests' measured duration
ENV = {"LANG": "C.UTF-8", "LC_ALL": "C.UTF-8", "PYTHONDONTWRITEBYTECODE": "1", "PYTHONHASHSEED": "0"}
FORMAT = 1
FINAL = ("killed", "survived", "timeout", "crashed")  # outcomes worth caching
STATUSES = ("killed", "survived", "timeout", "crashed", "error")  # what the runner may report

Progress = Callable[[str], None]


def plan_mutants(
    provenance: Provenance,
    policy: Policy,
    sources: Mapping[str, str],
    run: RunResult,
    hidden: frozenset[tuple[str, int]] = frozenset(),
) -> list[tuple[Mutant, tuple[str, ...]]]:
    """Every mutant of the executable machine-written lines of non-test code, with the tests to run it;
    none touching a ``hidden`` line (one that holds a credential-like literal: a report never quotes it)."""
    from verifier.mutation.plan import mutants_for_file
    from verifier.rules.catalog import load_all
    from verifier.testrun.testfiles import classify_test_code
    from verifier.verdict.settings import settings_for_path

    default_per_line = load_all()[RULE_ID].options["per_line"]
    is_test_code = classify_test_code(policy.coverage_exclude, sources)
    planned = []
    for path in sorted(provenance.machine_lines):
        if not path.endswith(".py") or path not in sources or is_test_code(path):
            continue
        per_line = int(settings_for_path(policy, path).option(RULE_ID, "per_line", default_per_line))
        lines = [line for line in provenance.machine_lines[path] if (path, line) not in hidden]
        for mutant in mutants_for_file(path, sources[path], lines, per_line):
            if not any((path, line) in hidden for line in range(mutant.line, mutant.end_line + 1)):
                planned.append((mutant, covering_tests(run, mutant)))
    return planned


def covering_tests(run: RunResult, mutant: Mutant) -> tuple[str, ...]:
    """The tests that executed the mutant's statement (passing ones only), fastest first. When the run
    executed the statement but no context names a test (it ran at import only, or the coverage data has
    no per-test contexts), every passing test runs it: slower, never a missed kill."""
    measured = run.coverage.get(mutant.path)
    if measured is None:
        return ()
    statement = mutant.lines or (mutant.line,)
    passed = {test.node_id: test for test in run.tests if test.outcome == "passed"}
    if mutant.scope is None:
        # runs at import, under the context of whichever test imported the module first: any test that
        # imports it can read what the line made (a constant, a table), so every passing test runs it
        return tuple(sorted(passed, key=lambda node: (passed[node].duration, node)))
    lines: Iterable[int] = statement
    contexts = {_test_of(context) for line in lines for context in measured.contexts.get(line, ())}
    fixtures = {context[len("fixture:") :] for context in contexts if context.startswith("fixture:")}
    chosen = {context for context in contexts if context in passed}
    chosen |= {node for node, test in passed.items() if fixtures.intersection(test.fixtures)}
    executed = any(line in measured.executed or measured.contexts.get(line) for line in statement)
    if not chosen and executed and not contexts - {""}:  # no context names a test (failing ones included)
        chosen = set(passed)
    return tuple(sorted(chosen, key=lambda node: (passed[node].duration, node)))


def _test_of(context: str) -> str:
    """A context names its test by node id; a ``|phase`` suffix (``nodeid|run``) is the same test."""
    test, _bar, phase = context.rpartition("|")
    return test if test and phase in ("setup", "run", "teardown") else context


def run_mutation(
    git: Git,
    change: Change,
    provenance: Provenance,
    policy: Policy,
    run: RunResult,
    sources: Mapping[str, str],
    backend_factory: Callable[[], Backend],
    shard: tuple[int, int] | None = None,
    say: Progress | None = None,
    hidden: frozenset[tuple[str, int]] = frozenset(),
    base_sources: Mapping[str, str] | None = None,
) -> MutationResult:
    """Plan, take what the cache knows, run the rest in the sandbox, and return every mutant's outcome
    (and, for the new or changed machine-written tests, their outcome with the base version of the code)."""
    say = say or (lambda _message: None)
    started = time.monotonic()
    # A shard plans every mutant and runs each against its own share of the tests (verifier.mutation.join).
    planned = plan_mutants(provenance, policy, sources, run, hidden)
    reverts = plan_reverts(change, provenance, policy, sources, base_sources or {}, run)
    planned += reverts
    outcomes: dict[int, MutantOutcome] = {}
    to_run: list[tuple[int, Mutant, tuple[str, ...]]] = []
    for number, (mutant, tests) in enumerate(planned):
        if not tests:
            outcomes[number] = MutantOutcome(mutant, "not-run")
        else:
            to_run.append((number, mutant, tests))
    backend = backend_factory() if to_run else None
    cache = OutcomeCache.open(git, change, policy, backend) if backend else None
    pending = []
    for number, mutant, tests in to_run:
        known = cache.get(mutant, tests) if cache else None
        if known is not None:
            outcomes[number] = MutantOutcome(mutant, known[0], tests, known[1], cached=True)  # type: ignore[arg-type]
        else:
            pending.append((number, mutant, tests))
    problem = None
    if pending and backend is not None:
        say(f"mutation: {counted(len(pending), 'mutant')} to run ({len(to_run) - len(pending)} known from the cache)")
        durations = {test.node_id: test.duration for test in run.tests}
        found, problem = _run_in_sandbox(git, change.head, policy, backend, pending, durations)
        outcomes.update(found)
        if cache:
            cache.save([outcome for outcome in found.values() if outcome.status in FINAL])
    ordered = tuple(outcomes[number] for number in sorted(outcomes))
    cached = sum(1 for outcome in ordered if outcome.cached)
    mutants = tuple(o for o in ordered if o.mutant.operator != REVERT)
    at_base = tuple(o for o in ordered if o.mutant.operator == REVERT)
    return MutationResult(mutants, round(time.monotonic() - started, 3), cached, shard, problem, at_base)


# -- new tests at base -------------------------------------------------------------------------------------------

REVERT = "revert"  # the "mutant" that puts a changed file back as it was at base
REVERTS_CAP = 20  # new or changed tests tried at base, at most, per change


def plan_reverts(
    change: Change,
    provenance: Provenance,
    policy: Policy,
    sources: Mapping[str, str],
    base_sources: Mapping[str, str],
    run: RunResult,
) -> list[tuple[Mutant, tuple[str, ...]]]:
    """For a change that modifies existing code and adds or changes tests: each new or changed
    machine-written test that executed any line of the modified file, to run with the file as it was at base (a test
    that still passes there does not show the change). The base text travels as the mutant's text."""
    from verifier.testrun.testfiles import classify_test_code

    is_test_code = classify_test_code(policy.coverage_exclude, sources)
    changed_tests = _changed_test_functions(provenance, is_test_code, sources)
    if not changed_tests:
        return []
    planned: list[tuple[Mutant, tuple[str, ...]]] = []
    for file in change.files:
        path, old = file.path, file.old_path
        if file.status != "modified" or not path.endswith(".py") or is_test_code(path):
            continue
        head, base = sources.get(path), base_sources.get(old or path)
        if head is None or base is None or head == base or path not in provenance.machine_lines:
            continue
        machine = provenance.machine_lines[path]
        revert = Mutant(path, 1, len(head.split("\n")), REVERT, head, base, None, tuple(machine))
        ran = set(covering_tests(run, revert))  # scope None: the tests that executed any line of the file
        for test in sorted(test for test in ran if test.split("[", 1)[0] in changed_tests):
            planned.append((revert, (test,)))
    return planned[:REVERTS_CAP]


def _changed_test_functions(
    provenance: Provenance, is_test_code: Callable[[str], bool], sources: Mapping[str, str]
) -> set[str]:
    """Node ids (without parameters) of test functions with a machine-written line, in test files (the
    functions pytest collects, as :func:`verifier.rules.weakened.read_module` reads them: unittest cases
    of any class name included)."""
    import ast

    from verifier.rules.weakened import read_module

    found: set[str] = set()
    for path, lines in provenance.machine_lines.items():
        if not path.endswith(".py") or not is_test_code(path) or path not in sources:
            continue
        try:
            tree = ast.parse(sources[path])
        except (SyntaxError, ValueError):
            continue
        machine = set(lines)
        for qualname, function in read_module(tree).functions.items():
            node = function.node
            body = range(node.lineno, (node.end_lineno or node.lineno) + 1)
            if not function.uncollected and machine.intersection(body):
                found.add(f"{path}::{qualname.replace('.', '::')}")
    return found


# -- the sandboxed run -------------------------------------------------------------------------------------------


def _run_in_sandbox(
    git: Git,
    head: str,
    policy: Policy,
    backend: Backend,
    pending: list[tuple[int, Mutant, tuple[str, ...]]],
    durations: Mapping[str, float],
) -> tuple[dict[int, MutantOutcome], str | None]:
    with git.exported(head, "mutants") as tree:
        request = prepare(tree, policy, pending, durations)
        result = backend.run(request)
    records = read_results(result.files.get(RESULTS), {f"m{number}" for number, _m, _t in pending})
    problem = None
    if result.timed_out or result.limit_hit:
        problem = f"the mutation run hit a sandbox limit ({result.limit_hit or 'wall'})"
    elif not records:
        problem = "the mutation runner wrote no results: " + (result.output[-300:].strip() or "no output")
    outcomes = {}
    for number, mutant, tests in pending:
        record = records.get(f"m{number}")
        if record is None:
            outcomes[number] = MutantOutcome(mutant, "error", tests, problem=problem or "no outcome reported")
        else:
            status, killed_by, reason, seconds = record
            outcomes[number] = MutantOutcome(
                mutant,
                status,  # type: ignore[arg-type]
                tests,
                killed_by,
                problem=reason,
                seconds=seconds,
            )
    return outcomes, problem


def prepare(
    tree: Path, policy: Policy, pending: list[tuple[int, Mutant, tuple[str, ...]]], durations: Mapping[str, float]
) -> SandboxRequest:
    """Copy the runner into ``tree`` and write its plan; the mutants' texts travel in the plan only."""
    folder = tree / WORK_DIR
    if folder.exists():
        shutil.rmtree(folder)
    (folder / "out").mkdir(parents=True)
    shutil.copyfile(RUNNER, folder / "runner.py")
    plan = {
        "results": RESULTS,
        "pytest_args": list(policy.pytest_args),
        "workers": os.cpu_count() or 1,
        "budget": max(1.0, policy.limits.wall_seconds - 15.0),
        "mutants": [
            {
                "id": f"m{number}",
                "path": mutant.path,
                "line": mutant.line,
                "end_line": mutant.end_line,
                "original": mutant.original,
                "mutated": mutant.mutated,
                "scope": mutant.scope,
                "tests": list(tests),
                "limit": time_limit(mutant, tests, durations),
            }
            for number, mutant, tests in pending
        ],
    }
    (folder / "plan.json").write_text(json.dumps(plan), encoding="utf-8")
    return SandboxRequest(
        tree=str(tree),
        python_args=(f"{WORK_DIR}/runner.py", f"{WORK_DIR}/plan.json"),
        env={**ENV, "PYTHONPATH": ":".join(policy.python_path)},
        limits=policy.limits,
        collect=(RESULTS,),
    )


def time_limit(mutant: Mutant, tests: tuple[str, ...], durations: Mapping[str, float]) -> float:
    """A mutant's time: a multiple of its tests' measured duration, with a floor (a fresh run gets more)."""
    floor = FORK_FLOOR_SECONDS if mutant.scope is not None else FRESH_FLOOR_SECONDS
    return round(floor + TIME_FACTOR * sum(durations.get(test, 0.0) for test in tests), 3)


Record = tuple[str, str | None, str | None, float]  # status, killed_by, problem, seconds


def read_results(data: bytes | None, expected: set[str]) -> dict[str, Record]:
    """The runner's records, validated: known ids only, known statuses only, short strings; the first
    record of an id counts. A file over the cap, or a line that is not a JSON object, is ignored."""
    if not data or len(data) > RESULTS_CAP:
        return {}
    records: dict[str, Record] = {}
    for line in data.decode("utf-8", "replace").splitlines():
        try:
            record = json.loads(line)
        except ValueError:
            continue
        if not isinstance(record, dict):
            continue
        mutant_id, status = record.get("id"), record.get("status")
        if mutant_id not in expected or status not in STATUSES or mutant_id in records:
            continue
        seconds = record.get("seconds")
        seconds = float(seconds) if isinstance(seconds, (int, float)) and 0 <= seconds < 1e6 else 0.0
        records[mutant_id] = (status, _short(record.get("killed_by")), _short(record.get("problem")), seconds)
    return records


def _short(value: Any) -> str | None:
    return value[:500] if isinstance(value, str) else None


# -- the cache ---------------------------------------------------------------------------------------------------


class OutcomeCache:
    """Outcomes of mutants by content key; one JSON file per head tree and environment, written atomically."""

    def __init__(self, file: Path | None, tree: str, environment: str) -> None:
        self.file = file
        self.tree = tree
        self.environment = environment
        self.known: dict[str, list[Any]] = {}
        if file is not None:
            try:
                data = json.loads(file.read_text(encoding="utf-8"))
                if data.get("format") == FORMAT and isinstance(data.get("outcomes"), dict):
                    self.known = data["outcomes"]
            except (OSError, ValueError, AttributeError):
                self.known = {}

    @classmethod
    def open(cls, git: Git, change: Change, policy: Policy, backend: Backend) -> OutcomeCache | None:
        if change.head == INDEX:  # the index has no tree object; writing one would touch the repository
            return None
        from verifier.selection.impactmap import environment_key, tree_of

        tree = tree_of(git, change.head)
        runner = hashlib.sha256(RUNNER.read_bytes()).hexdigest()[:16]
        environment = hashlib.sha256(f"{environment_key(policy, backend)}:{runner}".encode()).hexdigest()[:24]
        folder = git.common_dir() / "verifier" / "cache" / "mutants"
        return cls(folder / f"{tree}-{environment}.json", tree, environment)

    def key(self, mutant: Mutant, tests: tuple[str, ...]) -> str:
        facts = [mutant.path, mutant.line, mutant.end_line, mutant.original, mutant.mutated, mutant.scope, list(tests)]
        return hashlib.sha256(json.dumps(facts).encode()).hexdigest()[:32]

    def get(self, mutant: Mutant, tests: tuple[str, ...]) -> tuple[str, str | None] | None:
        entry = self.known.get(self.key(mutant, tests))
        if isinstance(entry, list) and len(entry) == 2 and entry[0] in FINAL:
            return entry[0], entry[1] if isinstance(entry[1], str) else None
        return None

    def save(self, outcomes: list[MutantOutcome]) -> None:
        if self.file is None or not outcomes:
            return
        for outcome in outcomes:
            self.known[self.key(outcome.mutant, outcome.tests)] = [outcome.status, outcome.killed_by]
        data = {"format": FORMAT, "tree": self.tree, "environment": self.environment, "outcomes": self.known}
        self.file.parent.mkdir(parents=True, exist_ok=True)
        handle, temporary = tempfile.mkstemp(prefix=".mutants-", dir=self.file.parent)
        try:
            with os.fdopen(handle, "w", encoding="utf-8") as out:
                json.dump(data, out, separators=(",", ":"))
            os.replace(temporary, self.file)
        except BaseException:
            Path(temporary).unlink(missing_ok=True)
            raise
