"""The plain data that flows between the pipeline's stages, each type defined once.

revision spec -> Change -> Provenance -> Policy -> Selection -> SandboxResult -> RunResult
-> Finding -> Report. Every type is a frozen dataclass of plain values, so a stage can be tested
on data alone and every boundary can be serialised (see :func:`to_plain`).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any, Literal

INDEX = "index"  # the "head" of a --staged check: the index, which has no commit yet

ChangeKind = Literal["range", "commit", "staged"]
FileStatus = Literal["added", "modified", "deleted", "renamed", "copied", "type-changed"]
Severity = Literal["block", "warn", "info", "error"]
Verdict = Literal["pass", "warn", "block", "error", "part"]  # part: check --part ran its share
RuleSetting = Literal["block", "advise", "ignore"]  # advise: findings warn; ignore: the rule is off


@dataclass(frozen=True)
class Commit:
    """One commit of the change (or the pending commit of a --staged check, sha ``index``)."""

    sha: str
    parents: tuple[str, ...]
    author: str
    committer: str
    message: str


@dataclass(frozen=True)
class FileChange:
    """One file of the final diff from base to head; line numbers are 1-based."""

    path: str  # at head; for a deletion, the deleted path
    old_path: str | None  # at base; None for an added file
    status: FileStatus
    binary: bool = False
    old_mode: str | None = None
    new_mode: str | None = None
    added_lines: tuple[int, ...] = ()  # numbers in the head version
    removed_lines: tuple[int, ...] = ()  # numbers in the base version


@dataclass(frozen=True)
class Change:
    """What changed: the base and head revisions, the commits between them and the final diff."""

    spec: str
    kind: ChangeKind
    base: str | None  # None: the empty tree (a root commit, or --staged in a repository with no commit)
    head: str  # a commit sha, or INDEX
    commits: tuple[Commit, ...]
    files: tuple[FileChange, ...]

    def file(self, path: str) -> FileChange | None:
        return next((f for f in self.files if f.path == path), None)


@dataclass(frozen=True)
class MachineMark:
    """What a commit's trailers say about who wrote it: the agent, and the paths the mark covers."""

    agent: str
    scope: tuple[str, ...] = ()  # path globs; empty means the whole commit


@dataclass(frozen=True)
class Provenance:
    """Which added lines of the final diff a model wrote, and which commit introduced each."""

    machine_lines: Mapping[str, tuple[int, ...]]
    line_commits: Mapping[str, Mapping[int, str]]  # path -> head line -> introducing commit sha
    marks: Mapping[str, MachineMark]  # commit sha -> its mark, for the machine-written commits only
    # paths (old and new names) that a machine-written commit of the change touched, within its scope
    machine_touched: frozenset[str] = frozenset()
    # machine-written commit sha -> the paths it touched, when its scope matches none of them
    scope_misses: Mapping[str, tuple[str, ...]] = field(default_factory=dict)

    @property
    def machine_line_count(self) -> int:
        return sum(len(lines) for lines in self.machine_lines.values())

    @property
    def agents(self) -> tuple[str, ...]:
        return tuple(sorted({mark.agent for mark in self.marks.values()}))


@dataclass(frozen=True)
class Limits:
    """Resource limits of one sandboxed run."""

    wall_seconds: float = 600.0
    cpu_seconds: int = 600
    memory_mb: int = 2048
    processes: int = 256
    output_bytes: int = 1_000_000
    file_size_mb: int = 64
    workspace_mb: int = 1024
    tmp_mb: int = 256


@dataclass(frozen=True)
class PathOverride:
    """Policy settings for the paths matching ``paths`` (globs); None or absent means "as the policy says"."""

    paths: tuple[str, ...]
    source: str  # file:line of the override in its policy file
    coverage_threshold: float | None = None
    rules: Mapping[str, RuleSetting] = field(default_factory=dict)
    rule_options: Mapping[str, Mapping[str, Any]] = field(default_factory=dict)


@dataclass(frozen=True)
class Waiver:
    """A trusted, owned, dated exception: findings of ``rule`` on paths matching ``path`` become info."""

    rule: str
    path: str  # a glob; "**" also matches the change-wide findings that have no path
    reason: str
    owner: str
    expires: str  # YYYY-MM-DD, the last day the waiver applies
    source: str = ""  # file:line of the waiver in its policy file


@dataclass(frozen=True)
class Policy:
    """The trusted policy that judges a change (read from the base revision, or the shipped default)."""

    source: str
    coverage_threshold: float = 90.0
    coverage_exclude: tuple[str, ...] = ()
    test_paths: tuple[str, ...] = ()
    pytest_args: tuple[str, ...] = ()
    python_path: tuple[str, ...] = (".", "src")
    limits: Limits = field(default_factory=Limits)
    allow_process_sandbox: bool = False
    rules: Mapping[str, RuleSetting] = field(default_factory=dict)
    rule_options: Mapping[str, Mapping[str, Any]] = field(default_factory=dict)  # rule id -> option -> value
    overrides: tuple[
        PathOverride, ...
    ] = ()  # in order; a later one wins (see verifier.verdict.settings.settings_for_path)
    waivers: tuple[Waiver, ...] = ()  # the waivers in force on the day the policy was read
    expired_waivers: tuple[Waiver, ...] = ()  # past their date: they waive nothing, their findings count again
    expiring_waivers: tuple[Waiver, ...] = ()  # of ``waivers``, those expiring soon (a warning ahead of time)
    agent_identities: tuple[str, ...] = ()  # emails of assistants whose unmarked commits the audit counts
    files: tuple[str, ...] = ()  # the repository's files (at base) this policy is built from: verifier.yaml, builds_on
    selection: SelectionSettings = field(default_factory=lambda: SelectionSettings())

    def setting(self, rule_id: str, default: RuleSetting) -> RuleSetting:
        return self.rules.get(rule_id, default)


@dataclass(frozen=True)
class Selection:
    """Which tests to run and why; an empty ``node_ids`` with ``whole_suite`` runs everything."""

    whole_suite: bool
    node_ids: tuple[str, ...] = ()
    reason: str = "all tests run"
    files: tuple[str, ...] = ()  # test files run whole (tests the change adds or modifies, importers)
    reasons: Mapping[str, tuple[str, ...]] = field(default_factory=dict)  # node id or file -> why it runs
    known_tests: int = 0  # tests the who-tests-what map knows at base (0: no map)
    left_out: int = 0  # of those, how many this selection does not run
    map_status: str = "not used"  # cached | built | updated | absent | not used
    shard: tuple[int, int] | None = None  # (K, N): this run is shard K of N of the selection


@dataclass(frozen=True)
class SelectionSettings:
    """The policy's ``selection:`` section: how tests are chosen, re-run and spread over cores."""

    run: Literal["observed", "all"] = "all"  # observed: the tests that can observe the change
    differential: bool = False  # also run the selected tests at base and classify each one
    reruns: int = 2  # a failing test is run again up to this many times; passing on one makes it flaky
    map_build: Literal["always", "if-cached", "never"] = "always"
    without_map: Literal["all", "imports"] = "all"  # what runs when there is no map
    workers: int = 0  # pytest-xdist workers; 0 = one per core, 1 = no xdist
    allow_flaky: bool = False  # a test that executes machine-written lines may fail, then pass on a re-run
    whole_suite_paths: tuple[str, ...] = ()  # globs of files whose change runs everything
    ignore_paths: tuple[str, ...] = ()  # globs of files no test reads (documentation)


# per-test progress of a run, for a display: (tests done, tests to run, the test that runs now)
TestProgress = Callable[[int, int, str], None]


@dataclass(frozen=True)
class SandboxRequest:
    """What a sandbox backend runs: a Python command in a copy of ``tree``, limited and scrubbed."""

    tree: str  # host folder holding the materialised tree; the backend copies or mounts it as the workspace
    python_args: tuple[str, ...]  # run as ``<the backend's python> *python_args`` with cwd = the workspace
    env: Mapping[str, str]
    limits: Limits
    collect: tuple[str, ...]  # workspace-relative files to bring back
    # sees the output as it arrives (the progress display); never judged, and its errors never stop a run
    on_output: Callable[[bytes], None] | None = field(default=None, compare=False, repr=False)


@dataclass(frozen=True)
class SandboxResult:
    """What came back from a sandboxed run: status, capped output, collected files, resource facts."""

    backend: str
    isolation: str  # one line: what this backend isolates
    exit_status: int | None  # None when killed by a signal or never started
    signal: int | None
    timed_out: bool
    output: str
    output_truncated: bool
    files: Mapping[str, bytes]
    wall_seconds: float
    cpu_seconds: float = 0.0
    max_rss_kb: int = 0
    limit_hit: str | None = None  # "wall", "output", "memory", "processes", "file-size" when known


@dataclass(frozen=True)
class TestOutcome:
    """One test's result, keyed by its pytest node id."""

    node_id: str
    outcome: Literal["passed", "failed", "error", "skipped", "flaky"]  # flaky: failed, then passed on a re-run
    message: str = ""
    duration: float = 0.0
    attempts: int = 1  # runs it took: 1 + the re-runs of a failing test
    fixtures: tuple[str, ...] = ()  # the names of the fixtures it used (pytest's item.fixturenames)


@dataclass(frozen=True)
class FileCoverage:
    """coverage.py's measurement of one file: executed and missing statements (first lines)."""

    path: str
    executed: frozenset[int]
    missing: frozenset[int]
    excluded: frozenset[int] = frozenset()
    contexts: Mapping[int, tuple[str, ...]] = field(default_factory=dict)
    # branch line -> the destinations coverage.py's analysis expects and the tests never took (host-computed)
    missing_branches: Mapping[int, tuple[int, ...]] = field(default_factory=dict)


RunStatus = Literal["completed", "timeout", "crashed", "collection-error", "no-tests", "harness-error"]
# what each status means, in words for people (the status names are for the reports' readers and code)
RUN_STATUS_TEXT: dict[str, str] = {
    "completed": "the test run ran to the end",
    "timeout": "the test run hit its wall-clock limit and was stopped",
    "crashed": "the test run ended without writing its results (crashed or killed)",
    "collection-error": "pytest could not collect the tests",
    "no-tests": "pytest collected no tests",
    "harness-error": "the test run's results cannot be trusted or the harness failed",
}


@dataclass(frozen=True)
class OldTestsRun:
    """The base versions of the changed test files run against the head code: did the old tests hold?"""

    status: str  # the run's RunStatus
    files: tuple[str, ...]  # the head paths that got their base text back
    tests: tuple[TestOutcome, ...] = ()
    collection_errors: tuple[str, ...] = ()  # "file: message": every base test of the file fails
    problems: tuple[str, ...] = ()


@dataclass(frozen=True)
class RunResult:
    """The test run, read from the files the harness wrote (never scraped from the console)."""

    status: RunStatus
    backend: str
    isolation: str
    pytest_exit: int | None
    tests: tuple[TestOutcome, ...]
    coverage: Mapping[str, FileCoverage]
    collection_errors: tuple[str, ...] = ()
    output_tail: str = ""
    wall_seconds: float = 0.0
    limit_hit: str | None = None
    baseline: Mapping[str, str] | None = None  # node id -> outcome at base (a differential run), else None
    problems: tuple[str, ...] = ()  # why the run's results cannot be trusted (status harness-error)
    skipped_modules: Mapping[str, str] = field(default_factory=dict)  # file -> reason its module skipped itself
    # the census (verifier.testrun.census): base node id -> outcome at base, of every base test this run
    # should have run again; None: not taken (a shard, a premade run) or the base could not run
    census: Mapping[str, str] | None = None
    census_problem: str = ""  # why the census could not be taken, when it could not
    # the base versions of the test files the change modifies, run against the head code
    # (verifier.testrun.oldtests); None: no such file
    old_tests: OldTestsRun | None = None

    def count(self, outcome: str) -> int:
        return sum(1 for t in self.tests if t.outcome == outcome)


@dataclass(frozen=True)
class Finding:
    """One thing a rule found; ``path`` and ``line`` are None for change-wide findings."""

    rule: str
    severity: Severity
    message: str
    path: str | None = None
    line: int | None = None
    details: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class CoverageSummary:
    """Coverage of the executable machine-written lines (coverage.py's statements)."""

    executable: int
    covered: int
    uncovered: Mapping[str, tuple[int, ...]]
    threshold: float
    # files a per-path override gives their own threshold: judged one by one, not counted above
    separate: tuple[CoverageTarget, ...] = ()
    excluded: Mapping[str, tuple[int, ...]] = field(default_factory=dict)  # machine lines coverage.py excludes
    # machine-written branch lines the tests executed without taking every branch: line -> missed destinations
    partial_branches: Mapping[str, Mapping[int, tuple[int, ...]]] = field(default_factory=dict)

    @property
    def percent(self) -> float | None:
        return None if self.executable == 0 else round(100.0 * self.covered / self.executable, 2)


@dataclass(frozen=True)
class CoverageTarget:
    """One file judged against its own coverage threshold (set by a per-path policy override)."""

    path: str
    threshold: float
    executable: int
    covered: int
    uncovered: tuple[int, ...] = ()

    @property
    def percent(self) -> float | None:
        return None if self.executable == 0 else round(100.0 * self.covered / self.executable, 2)


MutantStatus = Literal["killed", "survived", "timeout", "crashed", "not-run", "error"]


@dataclass(frozen=True)
class Mutant:
    """A small faulty version of one machine-written line: replace ``original`` by ``mutated`` in the file."""

    path: str
    line: int  # the first line the mutant changes
    end_line: int  # the last one (a statement spread over several lines)
    operator: str  # which kind of fault: compare, arithmetic, negate, and-or, constant, return, ...
    original: str  # the full text of lines line..end_line, exactly as in the file
    mutated: str  # the same lines with the fault
    scope: str | None = None  # qualified name of the function whose code the runner swaps; None: module level
    lines: tuple[int, ...] = ()  # the lines of its statement: the tests that ran any of them run the mutant


@dataclass(frozen=True)
class MutantOutcome:
    """What happened to one mutant: killed, survived, timeout and crashed (both count as killed), not-run,
    or error (the runner could not try it: the gate could not verify)."""

    mutant: Mutant
    status: MutantStatus
    tests: tuple[str, ...] = ()  # the tests that executed its line (the ones it was run against)
    killed_by: str | None = None  # the first test that failed, when known
    problem: str | None = None  # for ``error``: why the runner could not try it
    cached: bool = False
    seconds: float = 0.0  # how long its try took in the sandbox (0 when cached or not run)

    @property
    def counts_as_killed(self) -> bool:
        return self.status in ("killed", "timeout", "crashed")


@dataclass(frozen=True)
class MutationResult:
    """The mutation stage's outcome for a change: every mutant's fate, and how it was obtained."""

    outcomes: tuple[MutantOutcome, ...]
    wall_seconds: float = 0.0
    cached: int = 0  # outcomes read from the cache instead of run
    shard: tuple[int, int] | None = None  # (K, N): this run tried shard K of N of the mutants
    problem: str | None = None  # why the runner could not run (the gate could not verify), else None
    # new or changed machine-written tests run with a changed file as it was at base: "survived" means the
    # test passes there too, so it does not show the change (the mutant's texts are the file at head and base)
    at_base: tuple[MutantOutcome, ...] = ()

    def count(self, *statuses: str) -> int:
        return sum(1 for outcome in self.outcomes if outcome.status in statuses)


@dataclass(frozen=True)
class Report:
    """Everything the gate concluded about one change; the reporters only format this."""

    verdict: Verdict
    change: Change
    provenance: Provenance
    policy_source: str
    run: RunResult | None
    coverage: CoverageSummary | None
    findings: tuple[Finding, ...]
    sources: Mapping[str, Mapping[int, str]] = field(default_factory=dict)  # path -> line -> text, for display
    notes: tuple[str, ...] = ()  # plain facts the reader should see (e.g. "the process sandbox isolates nothing")
    waivers_used: tuple[Waiver, ...] = ()  # the policy's waivers that turned at least one finding into info
    selection: Selection | None = None  # which tests ran and why (None when no tests ran)
    mutation: MutationResult | None = None  # the mutants of the machine-written lines (None: stage not run)


def to_plain(value: Any) -> Any:
    """Turn nested dataclasses, mappings, tuples and sets into JSON-ready plain values."""
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return {f.name: to_plain(getattr(value, f.name)) for f in dataclasses.fields(value)}
    if isinstance(value, Mapping):
        return {str(k): to_plain(v) for k, v in value.items()}
    if isinstance(value, (frozenset, set)):
        return sorted(to_plain(v) for v in value)
    if isinstance(value, (list, tuple)):
        return [to_plain(v) for v in value]
    if isinstance(value, bytes):
        return value.decode("utf-8", "replace")
    return value
