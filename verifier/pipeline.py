"""The gate, end to end: ``verify(repo, spec, options) -> Report``.

Reading this module top to bottom follows one change from git to the verdict:
change -> provenance -> policy -> static rules -> selection -> sandbox -> dynamic rules -> verdict.
What one check knows is carried by one :class:`CheckContext`, built once the policy is read; each step
below takes it instead of a long list of parameters. Side effects stay at the edges: git is only read;
the files written are in a temporary folder outside the repository, removed in every case, and the
caches under git's common dir (the who-tests-what maps and base results of
:mod:`verifier.selection.impactmap` and :mod:`verifier.testrun.differential`, safe to delete).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, replace
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING

from verifier.change.stage import RevisionSpec, read_change, refuse_machine_submodules
from verifier.errors import PolicyError
from verifier.gitio import Git
from verifier.models import (
    INDEX,
    Change,
    CoverageSummary,
    Finding,
    MutationResult,
    Policy,
    Provenance,
    Report,
    RunResult,
    Selection,
    TestProgress,
)
from verifier.policy.loader import load_policy
from verifier.provenance.attribution import attribute, has_mark_text
from verifier.verdict.decision import decide, decide_part
from verifier.verdict.settings import enabled_anywhere, settings_for_path
from verifier.verdict.waivers import waived_by, waiver_notes, waivers_used
from verifier.words import counted

if TYPE_CHECKING:
    from verifier.sandbox import Backend
    from verifier.selection.impactmap import ImpactMap

Progress = Callable[[str], None]


@dataclass(frozen=True)
class Options:
    """How to run the gate."""

    sandbox: str = "auto"  # auto, or a name of verifier.sandbox.BACKENDS
    progress: Progress | None = None
    # per-test progress of the run at head and of the map's build at base (a terminal's display)
    test_progress: TestProgress | None = None
    org_policy: str | None = None  # the organisation policy's path; None: $VERIFIER_ORG_POLICY, if set
    index_file: str | None = None  # for --staged: the index to read (a commit hook's GIT_INDEX_FILE)
    all_tests: bool = False  # run every test, whatever the selection stage would choose
    shard: tuple[int, int] | None = None  # (K, N): run only shard K of N of the selected tests
    premade: tuple[Selection, RunResult] | None = None  # a run made elsewhere (joined shards): judge it as it is
    # the caller vouches for the code under test (the demo's own sample code), so the process sandbox may run
    # it whatever the policy says; the command line never sets this
    vouched_code: bool = False
    premade_mutation: MutationResult | None = None  # with ``premade``: the shards' joined mutants


@dataclass(frozen=True)
class CheckContext:
    """Everything one check has established before the tests run: where, what changed, who wrote it,
    the trusted policy, the changed files' texts, and how to run."""

    git: Git
    change: Change
    provenance: Provenance
    policy: Policy
    options: Options
    base_sources: Mapping[str, str] = field(default_factory=dict)  # base path -> text, every changed text file
    head_sources: Mapping[str, str] = field(default_factory=dict)  # head path -> text, every changed text file

    def say(self, message: str) -> None:
        if self.options.progress is not None:
            self.options.progress(message)


def verify(repo: str | Path, spec: RevisionSpec, options: Options | None = None) -> Report:
    """Judge the change ``spec`` of the repository at ``repo``."""
    options = options or Options()
    git = Git(Git(repo).toplevel(), index_file=options.index_file)
    change = read_change(git, spec)
    provenance = attribute(git, change)
    refuse_machine_submodules(change, provenance.machine_touched)
    policy = load_policy(git, change.base, options.org_policy)
    if not options.vouched_code:
        refuse_forbidden_sandbox(policy, options.sandbox)
    if not provenance.machine_lines and not (provenance.marks or has_mark_text(change)):
        empty = CheckContext(git, change, provenance, policy, options)
        return _report(empty, [], notes=("no machine-written lines to verify",))
    base_sources, head_sources = _changed_sources(git, change)
    check = CheckContext(git, change, provenance, policy, options, base_sources, head_sources)
    from verifier.rules import RuleContext
    from verifier.verdict.judge import apply_rules

    rules = RuleContext(change, provenance, policy, head_sources, base_sources, read_base=_base_reader(git, change))
    findings = apply_rules("static", rules)
    if not provenance.machine_lines and not _machine_touched_code(change, provenance):
        # a scope matching nothing, or a mark written where the gate does not read it, is still judged by the
        # static rules (verifier.rules.marks and the rest); there is no machine-written code to run
        return _report(check, findings, notes=("no machine-written lines to verify",))
    check.say(_what_is_judged(provenance))
    selection, run = _joined(check, options.premade) if options.premade is not None else _select_and_run(check)
    coverage = _coverage(check, run)
    dynamic = RuleContext(
        change, provenance, policy, head_sources, base_sources, run, coverage, waiver_of=waived_by(policy)
    )
    findings += apply_rules("dynamic", dynamic)
    mutation = _mutation(check, run, _secret_lines(findings))
    findings += apply_rules("mutation", replace(dynamic, mutation=mutation))
    notes = _sandbox_notes(run)
    return _report(check, findings, run=run, coverage=coverage, notes=notes, selection=selection, mutation=mutation)


def _machine_touched_code(change: Change, provenance: Provenance) -> bool:
    """Whether a machine commit changed a file the tests could notice, adding no line: a change that only
    deletes (a safety check, say) still runs the tests, or removing a check would verify nothing."""
    return any(path in provenance.machine_touched for f in change.files for path in (f.path, f.old_path) if path)


def _what_is_judged(provenance: Provenance) -> str:
    if not provenance.machine_lines:
        return "machine-written deletions only: running the tests they may break"
    lines, files = provenance.machine_line_count, len(provenance.machine_lines)
    return f"{counted(lines, 'machine-written line')} in {counted(files, 'file')}"


def _mutation(check: CheckContext, run: RunResult, hidden: frozenset[tuple[str, int]]) -> MutationResult | None:
    """The mutation stage, after a completed run of tests (a partial run cannot tell which tests ran a line)."""
    from verifier.mutation.counts import RULE_ID

    options = check.options
    if options.premade is not None:
        return options.premade_mutation if run.status == "completed" else None
    if run.status != "completed" or not enabled_anywhere(check.policy, RULE_ID, "block"):
        return None
    from verifier.mutation.stage import run_mutation

    return run_mutation(
        check.git,
        check.change,
        check.provenance,
        check.policy,
        run,
        check.head_sources,
        lambda: _backend(check),  # made only when a mutant must run
        options.shard,
        check.say,
        hidden,
        check.base_sources,
    )


def _secret_lines(findings: list[Finding]) -> frozenset[tuple[str, int]]:
    """Lines holding a credential-like literal: never quoted, so never mutated (a mutant quotes its line)."""
    return frozenset((f.path, f.line) for f in findings if f.rule == "secrets.literal" and f.path and f.line)


def refuse_forbidden_sandbox(policy: Policy, requested: str) -> None:
    """The trusted policy decides where tests may run: the command line cannot pick the process sandbox
    (which isolates nothing) when the policy does not allow it."""
    if requested == "process" and not policy.allow_process_sandbox:
        raise PolicyError(
            policy.source,
            None,
            "sandbox.allow_process",
            "the trusted policy does not allow the process sandbox, so --sandbox process cannot be used; "
            "choose another sandbox, or have a human set sandbox.allow_process: true in the policy",
        )


def _changed_sources(git: Git, change: Change) -> tuple[dict[str, str], dict[str, str]]:
    """The base and head text of every changed text file, read in one batch (for rules and display)."""
    head_prefix = ":" if change.head == INDEX else f"{change.head}:"
    wanted = [f for f in change.files if not f.binary]
    specs = [f"{head_prefix}{f.path}" for f in wanted if f.status != "deleted"]
    if change.base:
        specs += [f"{change.base}:{f.old_path}" for f in wanted if f.old_path]
    blobs = {spec: data.decode("utf-8", "replace") for spec, data in git.read_blobs(specs).items()}
    head = {f.path: blobs[s] for f in wanted if (s := f"{head_prefix}{f.path}") in blobs}
    base = {f.old_path: blobs[s] for f in wanted if f.old_path and (s := f"{change.base}:{f.old_path}") in blobs}
    return base, head


def _base_reader(git: Git, change: Change) -> Callable[[str], str | None]:
    """Read a file at the base revision on demand (for rules that consult files the change left alone).
    The first read also fetches the coverage configuration files ``config.harness`` reads, in the same
    ``git cat-file --batch`` (one git process instead of one per file); every answer is kept."""
    known: dict[str, str | None] = {}

    def read(path: str) -> str | None:
        if not change.base:
            return None
        if path not in known:
            # imported here, by then the rules are registered (in their order: it is the findings' order)
            from verifier.rules.harness import COVERAGE_CONFIGS

            wanted = list(dict.fromkeys([path, *(p for p in COVERAGE_CONFIGS if p not in known)]))
            blobs = git.read_blobs([f"{change.base}:{p}" for p in wanted])
            for name in wanted:
                data = blobs.get(f"{change.base}:{name}")
                known[name] = None if data is None else data.decode("utf-8", "replace")
        return known[path]

    return read


def _select_and_run(check: CheckContext) -> tuple[Selection, RunResult]:
    """Choose the tests (building the base map when needed), run them at head, and at base when asked."""
    from verifier.selection.plan import select_tests

    backend = _backend(check)
    selection, impact = select_tests(
        check.git,
        check.change,
        check.policy,
        backend,
        check.base_sources,
        check.head_sources,
        all_tests=check.options.all_tests,
        shard=check.options.shard,
        say=check.say,
        on_test=check.options.test_progress,
    )
    check.say(f"tests: {selection.reason} (map: {selection.map_status})")
    run = _census(check, selection, _run_tests(check, selection, backend), backend, impact)
    if check.policy.selection.differential or _fails(run):
        # a failure is judged knowing whether it fails at base too (a pre-existing failure does not block)
        from verifier.testrun.differential import with_baseline

        run = with_baseline(check.git, check.change, check.policy, selection, run, backend, impact, check.say)
    return selection, run


def _joined(check: CheckContext, premade: tuple[Selection, RunResult]) -> tuple[Selection, RunResult]:
    """Every part's run, joined: only here is the whole head run known, so the join takes the test census
    and runs the changed test files' base versions (no part can: each saw its share only)."""
    selection, run = premade
    if run.status != "completed" or not _census_wanted(check.policy):
        return selection, run
    return selection, _census(check, selection, run, _backend(check), None)


def _census_wanted(policy: Policy) -> bool:
    from verifier.rules.census import REWRITTEN_ID, RULE_ID

    return enabled_anywhere(policy, RULE_ID, "block") or enabled_anywhere(policy, REWRITTEN_ID, "block")


def _census(
    check: CheckContext, selection: Selection, run: RunResult, backend: Backend, impact: ImpactMap | None
) -> RunResult:
    """The test census (the base tests the head run should have run again) and the run of the changed test
    files' base versions at head, each unless its rule is off; neither on one shard of the selection (the
    census would miss the other shards' tests, and every shard would repeat the base versions' run)."""
    from verifier.rules.census import REWRITTEN_ID, RULE_ID

    if selection.shard is not None:
        return run
    if enabled_anywhere(check.policy, RULE_ID, "block"):
        from verifier.testrun.census import with_census

        run = with_census(check.git, check.change, selection, run, check.policy, backend, impact, check.say)
    if enabled_anywhere(check.policy, REWRITTEN_ID, "block"):
        from verifier.testrun.oldtests import with_old_tests

        run = with_old_tests(check.git, check.change, check.provenance, check.policy, run, backend, check.say)
    return run


def _fails(run: RunResult) -> bool:
    return run.status == "completed" and any(test.outcome in ("failed", "error") for test in run.tests)


def _backend(check: CheckContext) -> Backend:
    """The sandbox backend every run of this check uses (the map build at base, the run at head)."""
    from verifier import sandbox

    allowed = check.policy.allow_process_sandbox or check.options.vouched_code
    backend = sandbox.choose(check.options.sandbox, allowed)
    return backend.for_repository(str(check.git.repo), check.change.base)


def _run_tests(check: CheckContext, selection: Selection, backend: Backend) -> RunResult:
    """Materialise the head tree outside the repository and run the selected tests there, in the sandbox."""
    from verifier.testrun import harness as testrun

    check.say(f"running the tests in the {backend.name} sandbox")
    judged = tuple(f.path for f in check.change.files if f.path.endswith(".py") and f.added_lines)
    result = testrun.run_revision(
        check.git, check.change.head, check.policy, selection, backend, judged, check.options.test_progress
    )
    return testrun.read_run(result)


def _coverage(check: CheckContext, run: RunResult) -> CoverageSummary | None:
    """Coverage of the machine-written lines; None for a partial run (it would blame the code for what never ran)."""
    if run.status != "completed":
        return None
    from verifier.testrun.measure import summarise_coverage
    from verifier.testrun.testfiles import classify_test_code

    policy = check.policy
    return summarise_coverage(
        check.provenance.machine_lines,
        run.coverage,
        check.head_sources,
        policy.coverage_threshold,
        classify_test_code(policy.coverage_exclude, check.head_sources),
        threshold_for=lambda path: settings_for_path(policy, path).coverage_threshold,
    )


def _shown_sources(check: CheckContext, findings: list[Finding]) -> dict[str, dict[int, str]]:
    """The machine-written lines a report may quote; a line holding a credential-like literal is never quoted."""
    hidden = {(f.path, f.line) for f in findings if f.rule == "secrets.literal"}
    machine = check.provenance.machine_lines
    shown = {path: _lines(text, machine.get(path, ())) for path, text in check.head_sources.items()}
    for path, line in hidden:
        if path in shown and line in shown[path]:
            shown[path][line] = "<not shown: a credential-like literal (secrets.literal)>"
    return shown


def _lines(text: str, numbers: tuple[int, ...]) -> dict[int, str]:
    rows = text.split("\n")
    return {n: rows[n - 1] for n in numbers if 0 < n <= len(rows)}


def _sandbox_notes(run: RunResult) -> tuple[str, ...]:
    if run.backend == "process":
        return ("the process sandbox isolates nothing: the tests ran with the user's rights on this machine",)
    return ()


def _part_note(part: tuple[int, int] | None) -> str:
    index, total = part or (1, 1)
    return (
        f"part {index}/{total}: the findings above judge this part's tests alone (exit 4, no verdict); "
        f"join the JSON reports of all {total} parts with 'verifier join' for the verdict"
    )


def _report(
    check: CheckContext,
    findings: list[Finding],
    run: RunResult | None = None,
    coverage: CoverageSummary | None = None,
    notes: tuple[str, ...] = (),
    selection: Selection | None = None,
    mutation: MutationResult | None = None,
) -> Report:
    from verifier.report.bounds import bounded

    whole = check.options.shard is None or run is None  # a part's run is judged by joining every part
    return bounded(
        Report(
            verdict=decide(findings) if whole else decide_part(findings),
            change=check.change,
            provenance=check.provenance,
            policy_source=check.policy.source,
            run=run,
            coverage=coverage,
            findings=tuple(findings),
            sources=_shown_sources(check, findings),
            notes=(
                *notes,
                *waiver_notes(check.policy, datetime.now(timezone.utc).date()),
                *(() if whole else (_part_note(check.options.shard),)),
            ),
            waivers_used=waivers_used(check.policy, findings),
            selection=selection,
            mutation=mutation,
        )
    )
