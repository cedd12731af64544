"""Updating a who-tests-what map when the base moves a few commits, instead of building it again.

When the base revision has no map but one of its last few first-parent ancestors has one (in the same
environment), the change from that ancestor to the base is planned like any change
(:func:`verifier.selection.plan.plan`): the tests that can observe it, and the test files it adds or
modifies, run again at the base under coverage, and their records replace the old ones. Every other test
keeps its record; the line numbers of the files the commits changed are carried over through git's diff
(the lines neither added nor removed keep their order). Whatever would make the whole suite run (a
conftest, configuration or data file change, an empty plan's doubt, a run that does not complete) gives
up: the caller builds the map from scratch, so an update is never less safe than a build.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from typing import TYPE_CHECKING, Protocol

from verifier.errors import VerifierError
from verifier.models import Change, FileChange, Policy, Selection
from verifier.selection import impactmap
from verifier.selection.impactmap import ImpactMap

if TYPE_CHECKING:
    from verifier.gitio import Git
    from verifier.sandbox import Backend

MAX_STEPS = 8  # first-parent ancestors searched for a map to update


def ancestor_with_map(git: Git, base: str, environment: str) -> tuple[str, ImpactMap] | None:
    """The nearest of ``base``'s last few first-parent ancestors whose map is cached, with that map."""
    listing = git.text(["rev-list", "--first-parent", f"--max-count={MAX_STEPS + 1}", base, "--"])
    for revision in listing.split()[1:]:
        found = impactmap.load(git, impactmap.tree_of(git, revision), environment)
        if found is not None:
            return revision, found
    return None


# the selection's own planning (verifier.selection.plan, passed in: it calls this module): the tests the
# commits between the two maps can affect, or None when they call for the whole suite
class Picked(Protocol):
    """What the update needs of the selection's picks."""

    @property
    def node_ids(self) -> Iterable[str]: ...

    @property
    def files(self) -> Iterable[str]: ...


PickTests = Callable[[Change, ImpactMap, Mapping[str, str], Mapping[str, str]], "Picked | None"]


def update(
    git: Git,
    old: str,
    old_map: ImpactMap,
    base: str,
    policy: Policy,
    backend: Backend,
    environment: str,
    pick_tests: PickTests,
) -> ImpactMap | None:
    """``old_map`` (of commit ``old``) brought to ``base``; None when only a full build can be trusted."""
    from verifier.change.stage import RevisionSpec, read_change

    try:
        change = read_change(git, RevisionSpec(text=f"{old}..{base}"))
    except VerifierError:  # history the clone lacks, say: a full build still works
        return None
    if change.base != git.resolve(old):
        return None
    old_sources, new_sources = _sources(git, change)
    picks = pick_tests(change, old_map, old_sources, new_sources)
    if picks is None:
        return None
    stale = set(picks.node_ids) | old_map.tests_defined_in([*picks.files, *_changed_paths(change)])
    rerun = Selection(whole_suite=False, node_ids=tuple(sorted(set(picks.node_ids))), files=tuple(sorted(picks.files)))
    fresh: dict[str, dict[int, tuple[str, ...]]] = {}
    outcomes: dict[str, str] = {}
    fixtures: dict[str, tuple[str, ...]] = {}
    if rerun.node_ids or rerun.files:
        from verifier.testrun import harness as testrun

        run = testrun.read_run(testrun.run_revision(git, base, policy, rerun, backend))
        if run.status not in ("completed", "no-tests"):
            return None
        fresh = {path: dict(measured.contexts) for path, measured in run.coverage.items() if measured.contexts}
        outcomes = {test.node_id: test.outcome for test in run.tests}
        fixtures = {test.node_id: tuple(test.fixtures) for test in run.tests}
    return merged(old_map, impactmap.tree_of(git, base), environment, change, stale, fresh, outcomes, fixtures)


def merged(
    old_map: ImpactMap,
    tree: str,
    environment: str,
    change: Change,
    stale: set[str],
    fresh: Mapping[str, Mapping[int, tuple[str, ...]]],
    outcomes: Mapping[str, str],
    fixtures: Mapping[str, tuple[str, ...]],
) -> ImpactMap:
    """The old records without the ``stale`` tests, their lines renumbered to the new tree, and the fresh
    records of the tests that ran again."""
    moved = {f.old_path: f for f in change.files if f.old_path}
    lines: dict[str, dict[int, tuple[str, ...]]] = {}
    for path, measured in old_map.lines.items():
        changed = moved.get(path)
        if changed is not None and changed.status == "deleted":
            continue
        renumber = line_numbering(changed) if changed is not None else _same
        target = changed.path if changed is not None else path
        kept = lines.setdefault(target, {})
        for line, contexts in measured.items():
            new_line = renumber(line)
            alive = tuple(context for context in contexts if context not in stale)
            if new_line is not None and alive:
                kept[new_line] = alive
    for path, measured in fresh.items():
        kept = lines.setdefault(path, {})
        for line, contexts in measured.items():
            kept[line] = tuple(dict.fromkeys([*kept.get(line, ()), *contexts]))
    deleted_tests = set(old_map.tests_defined_in(f.path for f in change.files if f.status == "deleted"))
    old_outcomes = {t: o for t, o in old_map.outcomes.items() if t not in stale and t not in deleted_tests}
    old_fixtures = {t: used for t, used in old_map.fixtures.items() if t in old_outcomes}
    return ImpactMap(
        tree=tree,
        environment=environment,
        outcomes={**old_outcomes, **outcomes},
        fixtures={**old_fixtures, **fixtures},
        lines={path: measured for path, measured in lines.items() if measured},
    )


def line_numbering(changed: FileChange) -> Callable[[int], int | None]:
    """Old line -> new line for the lines the diff leaves alone (they keep their order between the
    removed and the added lines); None for a removed line, and for every line of a binary file."""
    if changed.binary:
        return lambda _line: None
    removed, added = set(changed.removed_lines), set(changed.added_lines)
    pairs: dict[int, int] = {}
    old_line = new_line = 0
    # step through both sides up to the last changed line; past it every line moves by the same amount
    while old_line <= max(removed, default=0) or new_line <= max(added, default=0):
        old_line += 1
        while old_line in removed:
            old_line += 1
        new_line += 1
        while new_line in added:
            new_line += 1
        pairs[old_line] = new_line
    shift, last = new_line - old_line, old_line

    def renumber(line: int) -> int | None:
        if line in pairs:
            return pairs[line]
        return line + shift if line > last else None

    return renumber


def _same(line: int) -> int | None:
    return line


def _changed_paths(change: Change) -> Iterable[str]:
    return [path for f in change.files for path in {f.path, f.old_path} if path]


def _is_python(changed: FileChange) -> bool:
    return changed.path.endswith(".py") or (changed.old_path or "").endswith(".py")


def _sources(git: Git, change: Change) -> tuple[dict[str, str], dict[str, str]]:
    """The old and new text of every changed Python file."""
    python = [
        f for f in change.files if not f.binary and (f.path.endswith(".py") or (f.old_path or "").endswith(".py"))
    ]
    specs = [f"{change.base}:{f.old_path}" for f in python if f.old_path]
    specs += [f"{change.head}:{f.path}" for f in python if f.status != "deleted"]
    blobs = {spec: data.decode("utf-8", "replace") for spec, data in git.read_blobs(specs).items()}
    old = {f.old_path: blobs[s] for f in python if f.old_path and (s := f"{change.base}:{f.old_path}") in blobs}
    new = {f.path: blobs[s] for f in python if (s := f"{change.head}:{f.path}") in blobs}
    return old, new
