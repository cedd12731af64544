"""The gate, end to end: ``verify(repo, spec, options) -> Report``.

Reading this module top to bottom follows one change from git to the verdict:
change -> provenance -> policy -> static rules -> selection -> sandbox -> dynamic rules -> verdict.
Side effects stay at the edges: git is only read; the files written are in a temporary folder outside
the repository, removed in every case, and the caches under git's common dir (the who-tests-what maps
and base results of :mod:`verifier.selection.impactmap` and :mod:`verifier.testrun.differential`, safe to delete).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path

from verifier.change.stage import RevisionSpec, read_change
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
)
from verifier.policy.loader import load_policy, policy_for_path, waivers_used
from verifier.provenance.attribution import attribute
from verifier.verdict.decision import decide

Progress = Callable[[str], None]


@dataclass(frozen=True)
class Options:
    """How to run the gate."""

    sandbox: str = "auto"  # auto | docker | namespace | process
    progress: Progress | None = None
    org_policy: str | None = None  # the organisation policy's path; None: $VERIFIER_ORG_POLICY, if set
    index_file: str | None = None  # for --staged: the index to read (a commit hook's GIT_INDEX_FILE)
    all_tests: bool = False  # run every test, whatever the selection stage would choose
    shard: tuple[int, int] | None = None  # (K, N): run only shard K of N of the selected tests
    premade: tuple[Selection, RunResult] | None = None  # a run made elsewhere (joined shards): judge it as it is
    premade_mutation: MutationResult | None = None  # with ``premade``: the shards' joined mutants


def verify(repo: str | Path, spec: RevisionSpec, options: Options | None = None) -> Report:
    """Judge the change ``spec`` of the repository at ``repo``."""
    options = options or Options()
    say = options.progress or (lambda _message: None)
    git = Git(Git(repo).toplevel(), index_file=options.index_file)
    change = read_change(git, spec)
    provenance = attribute(git, change)
    policy = load_policy(git, change.base, options.org_policy)
    if not provenance.machine_lines:
        return _report(change, provenance, policy, None, [], {}, notes=("no machine-written lines to verify",))
    base_sources, sources = _changed_sources(git, change)
    from verifier.rules import RuleContext, apply_rules

    context = RuleContext(change, provenance, policy, sources, base_sources, read_base=_base_reader(git, change))
    findings = apply_rules("static", context)
    say(f"{provenance.machine_line_count} machine-written lines in {len(provenance.machine_lines)} files")
    if options.premade is not None:
        selection, run = options.premade
    else:
        selection, run = _select_and_run(git, change, policy, options, base_sources, sources, say)
    from verifier.testrun.measure import summarise_coverage

    coverage = None
    if run.status == "completed":  # a partial run's coverage would blame the code for what never ran
        coverage = summarise_coverage(
            provenance.machine_lines,
            run.coverage,
            sources,
            policy.coverage_threshold,
            policy.coverage_exclude,
            threshold_for=lambda path: policy_for_path(policy, path).coverage_threshold,
        )
    dynamic = RuleContext(change, provenance, policy, sources, base_sources, run, coverage)
    findings += apply_rules("dynamic", dynamic)
    hidden = _secret_lines(findings)
    mutation = _mutation(git, change, provenance, policy, run, sources, base_sources, options, say, hidden)
    findings += apply_rules("mutation", replace(dynamic, mutation=mutation))
    notes = _sandbox_notes(run)
    return _report(
        change,
        provenance,
        policy,
        run,
        findings,
        sources,
        coverage=coverage,
        notes=notes,
        selection=selection,
        mutation=mutation,
    )


def _mutation(
    git: Git,
    change: Change,
    provenance: Provenance,
    policy: Policy,
    run: RunResult,
    sources: dict[str, str],
    base_sources: dict[str, str],
    options: Options,
    say: Progress,
    hidden: frozenset[tuple[str, int]] = frozenset(),
) -> MutationResult | None:
    """The mutation stage, after a completed run of tests (a partial run cannot tell which tests ran a line)."""
    from verifier.mutation.counts import RULE_ID
    from verifier.policy.loader import enabled_anywhere

    if options.premade is not None:
        return options.premade_mutation if run.status == "completed" else None
    if run.status != "completed" or not enabled_anywhere(policy, RULE_ID, "block"):
        return None
    from verifier.mutation.stage import run_mutation

    backend = lambda: _backend(git, change, policy, options)  # noqa: E731  # made only when a mutant must run
    return run_mutation(
        git, change, provenance, policy, run, sources, backend, options.shard, say, hidden, base_sources
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


def _select_and_run(
    git: Git,
    change: Change,
    policy: Policy,
    options: Options,
    base_sources: dict[str, str],
    sources: dict[str, str],
    say: Progress,
) -> tuple[Selection, RunResult]:
    """Choose the tests (building the base map when needed), run them at head, and at base when asked."""
    from verifier.selection.plan import select_tests

    backend = _backend(git, change, policy, options)
    selection, impact = select_tests(
        git, change, policy, backend, base_sources, sources, all_tests=options.all_tests, shard=options.shard, say=say
    )
    say(f"tests: {selection.reason} (map: {selection.map_status})")
    run = _run_tests(git, change, policy, selection, backend, say)
    if policy.selection.differential:
        from verifier.testrun.differential import with_baseline

        run = with_baseline(git, change, policy, selection, run, backend, impact, say)
    return selection, run


def _backend(git: Git, change: Change, policy: Policy, options: Options):  # type: ignore[no-untyped-def]
    """The sandbox backend every run of this check uses (the map build at base, the run at head)."""
    from verifier import sandbox

    backend = sandbox.choose(options.sandbox, policy.allow_process_sandbox or options.sandbox == "process")
    if backend.name == "docker":
        _pick_image(backend, git, change)
    return backend


def _run_tests(
    git: Git,
    change: Change,
    policy: Policy,
    selection: Selection,
    backend,
    say: Progress,  # type: ignore[no-untyped-def]
) -> RunResult:
    """Materialise the head tree outside the repository and run the selected tests there, in the sandbox."""
    from verifier.testrun import harness as testrun

    say(f"running the tests in the {backend.name} sandbox")
    judged = tuple(f.path for f in change.files if f.path.endswith(".py") and f.added_lines)
    return testrun.read_run(testrun.run_revision(git, change.head, policy, selection, backend, judged))


def _pick_image(backend, git: Git, change: Change) -> None:  # type: ignore[no-untyped-def]
    """Use the image built for this repository's test dependencies (at base) when there is one."""
    import os

    from verifier.sandbox.docker import IMAGE_ENV
    from verifier.sandbox.images import image_for

    if not os.environ.get(IMAGE_ENV):
        backend.image = image_for(str(git.repo), change.base) or backend.image


def _secret_lines(findings: list[Finding]) -> frozenset[tuple[str, int]]:
    """Lines holding a credential-like literal: never quoted, so never mutated (a mutant quotes its line)."""
    return frozenset((f.path, f.line) for f in findings if f.rule == "secrets.literal" and f.path and f.line)


def _shown_sources(sources: dict[str, str], provenance: Provenance, findings: list[Finding]) -> dict:
    """The machine-written lines a report may quote; a line holding a credential-like literal is never quoted."""
    hidden = {(f.path, f.line) for f in findings if f.rule == "secrets.literal"}
    shown = {path: _lines(text, provenance.machine_lines.get(path, ())) for path, text in sources.items()}
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


def _report(
    change: Change,
    provenance: Provenance,
    policy: Policy,
    run: RunResult | None,
    findings: list[Finding],
    sources: dict[str, str],
    coverage: CoverageSummary | None = None,
    notes: tuple[str, ...] = (),
    selection: Selection | None = None,
    mutation: MutationResult | None = None,
) -> Report:
    return Report(
        verdict=decide(findings),
        change=change,
        provenance=provenance,
        policy_source=policy.source,
        run=run,
        coverage=coverage,
        findings=tuple(findings),
        sources=_shown_sources(sources, provenance, findings),
        notes=notes,
        waivers_used=waivers_used(policy, findings),
        selection=selection,
        mutation=mutation,
    )
