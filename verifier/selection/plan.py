"""The selection stage: which tests can observe the change, and why each one runs.

A test is selected when it could behave differently at head than at base:

* it executed, at base, a function the change touches (any changed line, machine-written or not: a
  human line in the same change can break a machine test). The who-tests-what map
  (:mod:`verifier.selection.impactmap`) says which tests executed which lines; a changed line inside a function's
  body stands for the whole function, so that a test that ran the function is selected even when the
  change is on a line it skipped. Lines the function ran at import time, outside any test, make it a
  module-level change;
* the change adds or modifies its test file (the whole file runs);
* a module-level line of a file it depends on changed (a constant, an import, a decorator, a class
  body, a default argument): every test that executed the file and every test file that imports it,
  directly or through other modules (:mod:`verifier.selection.imports`);
* it failed at base (so that a selection never hides a failure the whole suite would show).

What the map cannot see runs everything: a change to ``conftest.py``, configuration, fixtures' data or
any other file the tests may read (the policy's ``selection.whole_suite_paths``, and every non-Python
file outside ``selection.ignore_paths``). Without a map (not cached and not built), the policy says
whether everything runs or the import graph alone chooses. A selection that comes out empty runs
everything too: the gate never passes a change because nothing looked at it.
"""

from __future__ import annotations

import ast
import contextlib
import json
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

from verifier.models import INDEX, Change, FileChange, Policy, Selection
from verifier.pathglob import matches_any
from verifier.selection import impactmap
from verifier.selection.impactmap import IMPORT_TIME, ImpactMap

if TYPE_CHECKING:
    from verifier.gitio import Git
    from verifier.sandbox import Backend
    from verifier.selection.imports import ImportGraph

TEST_FILES = ("**/test_*.py", "**/*_test.py")
MAX_REASONS = 3  # per test, in the report

Importers = Callable[[str, str], set[str]]  # (revision side "base"|"head", path) -> files importing it


@dataclass
class Picks:
    """The tests chosen so far, each with the reasons it was chosen."""

    node_ids: dict[str, list[str]] = field(default_factory=dict)
    files: dict[str, list[str]] = field(default_factory=dict)

    def add_tests(self, tests: Iterable[str], reason: str) -> None:
        for test in tests:
            _add_reason(self.node_ids, test, reason)

    def add_files(self, paths: Iterable[str], reason: str) -> None:
        for path in paths:
            _add_reason(self.files, path, reason)


def _add_reason(chosen: dict[str, list[str]], key: str, reason: str) -> None:
    reasons = chosen.setdefault(key, [])
    if reason not in reasons and len(reasons) < MAX_REASONS:
        reasons.append(reason)


# -- the stage --------------------------------------------------------------------------------------------------


def select_tests(
    git: Git,
    change: Change,
    policy: Policy,
    backend: Backend,
    base_sources: Mapping[str, str],
    head_sources: Mapping[str, str],
    *,
    all_tests: bool = False,
    shard: tuple[int, int] | None = None,
    say: Callable[[str], None] = lambda _message: None,
) -> tuple[Selection, ImpactMap | None]:
    """Choose the tests for ``change``; also return the base map when one was used (its outcomes serve
    a differential run)."""
    settings = policy.selection
    if all_tests:
        return whole_suite("--all-tests asks for every test", shard), None
    if settings.mode == "all":
        return whole_suite("the policy's selection.mode is 'all'", shard), None
    if change.base is None:
        return whole_suite("the change has no base revision to map", shard), None
    trigger = whole_suite_trigger(change, policy)
    if trigger:
        return whole_suite(trigger, shard), None
    impact, status = obtain_map(git, change.base, policy, backend, say)
    if impact is None and settings.without_map == "all":
        return whole_suite(f"no who-tests-what map of the base revision ({status})", shard, status), None
    picks = plan(change, impact, base_sources, head_sources, _importers(git, change, policy))
    selection = to_selection(picks, impact, status, shard)
    if not selection.node_ids and not selection.files:
        return whole_suite("no test executed or imports what the change touches", shard, status, impact), impact
    return selection, impact


def whole_suite(
    reason: str, shard: tuple[int, int] | None = None, status: str = "not used", impact: ImpactMap | None = None
) -> Selection:
    known = len(impact.outcomes) if impact else 0
    return Selection(whole_suite=True, reason=reason, map_status=status, shard=shard, known_tests=known)


def whole_suite_trigger(change: Change, policy: Policy) -> str | None:
    """Why the whole suite must run for ``change`` (a file the map cannot see), or None."""
    settings = policy.selection
    for changed in change.files:
        for path in {changed.path, changed.old_path or changed.path}:
            if matches_any(path, settings.whole_suite_paths):
                return f"the change touches {path}, which any test may depend on"
            readable = changed.binary or not path.endswith(".py")
            if readable and not matches_any(path, settings.ignore_paths):
                return f"the change touches {path}, a file the tests may read"
    return None


def obtain_map(
    git: Git, base: str, policy: Policy, backend: Backend, say: Callable[[str], None]
) -> tuple[ImpactMap | None, str]:
    """The base revision's map: from the cache, else built now when the policy allows; with its status."""
    environment = impactmap.environment_key(policy, backend)
    tree = impactmap.tree_of(git, base)
    cached = impactmap.load(git, tree, environment)
    if cached is not None:
        return cached, "cached"
    if policy.selection.map_build != "always":
        return None, f"not cached; the policy's selection.map_build is '{policy.selection.map_build}'"
    say("building the who-tests-what map: the whole suite at base, under coverage")
    built, run = impactmap.build(git, base, policy, backend, environment)
    if built is None:
        return None, f"could not be built: the run at base ended '{run.status}'"
    impactmap.save(git, built)
    return built, "built"


def to_selection(picks: Picks, impact: ImpactMap | None, status: str, shard: tuple[int, int] | None) -> Selection:
    reasons = {key: tuple(value) for key, value in {**picks.node_ids, **picks.files}.items()}
    known = set(impact.outcomes) if impact else set()
    chosen = set(picks.node_ids) | (impact.tests_defined_in(picks.files) if impact else set())
    described = f"{len(picks.node_ids)} test(s) and {len(picks.files)} test file(s) that can observe the change"
    return Selection(
        whole_suite=False,
        node_ids=tuple(sorted(picks.node_ids)),
        files=tuple(sorted(picks.files)),
        reason=described,
        reasons=reasons,
        known_tests=len(known),
        left_out=len(known - chosen),
        map_status=status if impact else f"absent ({status}); chosen by the import graph",
        shard=shard,
    )


# -- planning (pure: the change, the map and the import graph in, picks out) ----------------------------------


def plan(
    change: Change,
    impact: ImpactMap | None,
    base_sources: Mapping[str, str],
    head_sources: Mapping[str, str],
    importers: Importers,
) -> Picks:
    """The tests that can observe ``change``, each with its reasons."""
    picks = Picks()
    for changed in change.files:
        if changed.path.endswith(".py") and changed.status != "deleted" and is_test_file(changed.path):
            picks.add_files([changed.path], f"the change {_verb(changed)} this test file")
        if changed.old_path is None or not changed.old_path.endswith(".py"):
            if changed.path.endswith(".py"):
                picks.add_files(_tests_among(importers("head", changed.path)), f"imports {changed.path}, a new file")
            continue
        _pick_for_file(picks, changed, impact, base_sources, head_sources, importers)
    if impact is not None:
        failing = [test for test, outcome in impact.outcomes.items() if outcome in ("failed", "error")]
        picks.add_tests(failing, "failed at base")
    return picks


def _verb(changed: FileChange) -> str:
    return {"added": "adds", "renamed": "renames", "copied": "copies"}.get(changed.status, "modifies")


def _pick_for_file(
    picks: Picks,
    changed: FileChange,
    impact: ImpactMap | None,
    base_sources: Mapping[str, str],
    head_sources: Mapping[str, str],
    importers: Importers,
) -> None:
    base_path = changed.old_path or changed.path
    importing = _tests_among(importers("base", base_path))
    if impact is None or base_path not in impact.lines:
        why = "no map" if impact is None else "no test executed it at base"
        picks.add_files(importing, f"imports {base_path}, which the change touches ({why})")
        return
    if changed.status in ("deleted", "renamed"):
        picks.add_tests(impact.tests_in_file(base_path), f"executed {base_path}, which the change {changed.status}")
        picks.add_files(importing, f"imports {base_path}, which the change {changed.status}")
        if changed.status == "deleted":
            return
    base_text = base_sources.get(base_path, "")
    head_text = head_sources.get(changed.path, "")
    for scope in touched_scopes(changed, base_text, head_text):
        _pick_for_scope(picks, base_path, scope, impact, importing)


def _pick_for_scope(picks: Picks, path: str, scope: Scope, impact: ImpactMap, importing: set[str]) -> None:
    where = f"{path}:{scope.changed_line}"
    if scope.function is not None:
        contexts = impact.contexts_in(path, range(scope.function.body_start, scope.function.end + 1))
        if IMPORT_TIME not in contexts:
            picks.add_tests(impact.tests_for(contexts), f"executed {scope.function.name}() changed at {where}")
            return
    if scope.new_definition:
        picks.add_tests(impact.tests_in_file(path), f"executed {path}, which gets a new definition at {where}")
        return
    picks.add_tests(impact.tests_in_file(path), f"executed {path}, whose module-level code changes at {where}")
    picks.add_files(importing, f"imports {path}, whose module-level code changes at {where}")


def is_test_file(path: str) -> bool:
    return matches_any(path, TEST_FILES)


def _tests_among(paths: Iterable[str]) -> set[str]:
    return {path for path in paths if is_test_file(path)}


# -- which scopes a change touches ---------------------------------------------------------------------------------


@dataclass(frozen=True)
class Function:
    """A function (or a class) of a source file: its qualified name, first line (decorators included) and
    the lines of its body."""

    name: str
    body_start: int
    end: int
    start: int = 0
    is_class: bool = False


@dataclass(frozen=True)
class Scope:
    """Where one changed line is, in base terms: a base function's body, a new definition, or module level."""

    changed_line: int  # the line's number (base for removed lines, head for added ones)
    function: Function | None = None  # the base function whose body holds the change
    new_definition: bool = False  # a function or method the base does not have


def touched_scopes(changed: FileChange, base_text: str, head_text: str) -> list[Scope]:
    """The scopes of the change's executable lines (blank and comment-only lines change nothing)."""
    base_functions, head_functions = functions(base_text), functions(head_text)
    by_name = {f.name: f for f in base_functions or ()}
    scopes: list[Scope] = []
    base_rows, head_rows = base_text.split("\n"), head_text.split("\n")
    for line in changed.removed_lines:
        if _is_code(base_rows, line):
            inner = innermost(base_functions, line) if base_functions is not None else None
            scopes.append(Scope(line, function=inner))
    for line in changed.added_lines:
        if _is_code(head_rows, line):
            scopes.append(_head_scope(line, head_functions, by_name))
    return _unique(scopes)


def _head_scope(line: int, head_functions: list[Function] | None, by_name: Mapping[str, Function]) -> Scope:
    """An added line's scope in base terms: the base function of the same name, else the nearest
    enclosing function the base has; a function of its own that the base lacks is a new definition."""
    if head_functions is None:
        return Scope(line)  # head does not parse: treat as module-level (code.syntax reports it)
    inner = innermost(head_functions, line)
    if inner is None:
        header = _new_header(head_functions, line, by_name)
        return Scope(line, new_definition=header)
    name = inner.name
    while name:
        if name in by_name:
            return Scope(line, function=by_name[name])
        name = name.rpartition(".")[0]
    return Scope(line, new_definition=True)


def _new_header(head_functions: list[Function], line: int, by_name: Mapping[str, Function]) -> bool:
    """Whether module-level ``line`` belongs to a function or class the base does not have (its ``def`` or
    ``class`` line, decorators, or a new class's body): a new name no existing test can reach."""
    for found in head_functions:
        if found.start <= line <= found.end and (found.is_class or line < found.body_start):
            return found.name not in by_name
    return False


def _unique(scopes: list[Scope]) -> list[Scope]:
    seen: set[tuple] = set()
    kept = []
    for scope in scopes:
        whole = scope.function is not None or scope.new_definition
        key = (scope.function, scope.new_definition) if whole else (scope.changed_line,)
        if key not in seen:
            seen.add(key)
            kept.append(scope)
    return kept


def _is_code(rows: list[str], line: int) -> bool:
    text = rows[line - 1].strip() if 0 < line <= len(rows) else ""
    return bool(text) and not text.startswith("#")


def functions(source: str) -> list[Function] | None:
    """Every function, method and class of ``source`` with its lines; None when it does not parse."""
    try:
        tree = ast.parse(source)
    except (SyntaxError, ValueError):
        return None
    found: list[Function] = []

    def visit(node: ast.AST, prefix: str) -> None:
        for child in ast.iter_child_nodes(node):
            if isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)):
                name = f"{prefix}{child.name}"
                start = min([child.lineno, *(d.lineno for d in child.decorator_list)])
                end = child.end_lineno or child.body[-1].lineno
                found.append(Function(name, child.body[0].lineno, end, start, isinstance(child, ast.ClassDef)))
                visit(child, f"{name}.")
            else:
                visit(child, prefix)

    visit(tree, "")
    return found


def innermost(found: list[Function] | None, line: int) -> Function | None:
    """The innermost function whose body holds ``line`` (a ``def`` line itself runs in the enclosing scope)."""
    holding = [f for f in found or () if not f.is_class and f.body_start <= line <= f.end]
    return max(holding, key=lambda f: f.body_start) if holding else None


# -- the import graph, read from git only when needed ------------------------------------------------------------


def _importers(git: Git, change: Change, policy: Policy) -> Importers:
    from verifier.selection.imports import build_graph

    graphs: dict[str, ImportGraph] = {}

    def importers(side: str, path: str) -> set[str]:
        if side not in graphs:
            revision = change.base if side == "base" else change.head
            graphs[side] = _cached_graph(git, revision, lambda: build_graph(python_sources(git, revision)))
        return graphs[side].importers([path])

    return importers


def _cached_graph(git: Git, revision: str | None, build: Callable[[], ImportGraph]) -> ImportGraph:
    """The import graph of a commit's tree, kept beside the who-tests-what maps (keyed by the tree hash,
    safe to delete); the index and the empty tree are read every time."""
    from verifier.selection.impactmap import cache_dir, tree_of
    from verifier.selection.imports import ImportGraph

    if revision is None or revision == INDEX:
        return build()
    path = cache_dir(git).parent / "imports" / f"{tree_of(git, revision)}.json"
    try:
        stored = json.loads(path.read_text())
        return ImportGraph({name: frozenset(targets) for name, targets in stored.items()})
    except (OSError, ValueError, AttributeError):
        graph = build()
    with contextlib.suppress(OSError):
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps({name: sorted(targets) for name, targets in graph.imports.items()}))
    return graph


def python_sources(git: Git, revision: str | None) -> dict[str, str]:
    """Every Python file of ``revision`` (a commit, INDEX, or None for the empty tree), read in one batch."""
    if revision is None:
        return {}
    if revision == INDEX:
        names = git.run(["ls-files", "-z"]).decode("utf-8", "surrogateescape").split("\0")
        prefix = ":"
    else:
        listing = git.run(["ls-tree", "-r", "-z", "--name-only", revision])
        names = listing.decode("utf-8", "surrogateescape").split("\0")
        prefix = f"{revision}:"
    python = [name for name in names if name.endswith(".py")]
    blobs = git.read_blobs([f"{prefix}{name}" for name in python])
    return {name: blobs[f"{prefix}{name}"].decode("utf-8", "replace") for name in python if f"{prefix}{name}" in blobs}
