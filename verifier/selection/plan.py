"""The selection stage: which tests can observe the change, and why each one runs.

A test is selected when it could behave differently at head than at base:

* it executed, at base, a function the change touches (any changed line, machine-written or not: a
  human line in the same change can break a machine test). The who-tests-what map
  (:mod:`verifier.selection.impactmap`) says which tests executed which lines; a changed line inside a function's
  body stands for the whole function, so that a test that ran the function is selected even when the
  change is on a line it skipped. Lines the function ran at import time, outside any test, make it a
  module-level change;
* the change adds a function or method the base lacks, and it ran the class that gets the method (any
  of its methods) or the module that gets the function, or its file mentions the new name (a test file
  runs whole; a module that mentions it, as ``getattr(self, "name", None)`` does, brings the tests that
  ran that module). A new definition that cannot be trusted to be new is a module-level change: a name
  Python calls by itself (``__eq__``), a name the base already binds there, a decorator that may record
  it, a class with a base class or keywords, a method of a class no test ran a method of;
* the change adds or modifies its test file (the whole file runs);
* a module-level line of a file it depends on changed (a constant, an import, a decorator, a class
  body, a default argument): every test that executed the file and every test file that imports it,
  directly or through other modules (:mod:`verifier.selection.imports`);
* it failed at base (so that a selection never hides a failure the whole suite would show);
* its test file starts processes (``subprocess``, ``multiprocessing``, ``os.system``, ``sys.executable``
  ...), itself or through a helper of the test folders it imports, and the change touches Python code:
  coverage.py measures the test's own process only, so the map cannot see what the child runs.

What the map cannot see runs everything: a change to ``conftest.py``, configuration, fixtures' data or
any other file the tests may read (the policy's ``selection.whole_suite_paths``, and every non-Python
file outside ``selection.ignore_paths``). Without a map (not cached and not built), the policy says
whether everything runs or the import graph alone chooses; a base a few commits ahead of a mapped one
gets its map updated (:mod:`verifier.selection.update`). A selection that comes out empty runs
everything too: the gate never passes a change because nothing looked at it.
"""

from __future__ import annotations

import ast
import contextlib
import json
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

from verifier.models import INDEX, RUN_STATUS_TEXT, Change, FileChange, Policy, Selection, TestProgress
from verifier.pathglob import matches_any
from verifier.selection import impactmap
from verifier.selection.impactmap import IMPORT_TIME, ImpactMap
from verifier.selection.imports import dotted_name
from verifier.words import counted

if TYPE_CHECKING:
    from verifier.gitio import Git
    from verifier.sandbox import Backend
    from verifier.selection.imports import ImportGraph
    from verifier.selection.update import PickTests

TEST_FILES = ("**/test_*.py", "**/*_test.py")
MAX_REASONS = 3  # per test, in the report

Importers = Callable[[str, str], set[str]]  # (revision side "base"|"head", path) -> files importing it
Referrers = Callable[[str], set[str]]  # a name -> the files of the head tree that mention it
Spawners = Callable[[], set[str]]  # -> the test files of the head tree that start processes


def no_referrers(_name: str) -> set[str]:
    return set()


def no_spawners() -> set[str]:
    return set()


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
    on_test: TestProgress | None = None,
) -> tuple[Selection, ImpactMap | None]:
    """Choose the tests for ``change``; also return the base map when one was used (its outcomes serve
    a differential run)."""
    settings = policy.selection
    if all_tests:
        return whole_suite("--all-tests asks for every test", shard), None
    if settings.run == "all":
        return whole_suite("the policy's selection.run is 'all'", shard), None
    if change.base is None:
        return whole_suite("the change has no base revision to map", shard), None
    trigger = whole_suite_trigger(change, policy)
    if trigger:
        return whole_suite(trigger, shard), None
    impact, status = obtain_map(git, change.base, policy, backend, say, on_test)
    if impact is None and settings.without_map == "all":
        return whole_suite(f"no who-tests-what map of the base revision ({status})", shard, status), None
    importers = importers_for(git, change, policy)
    picks = plan(
        change,
        impact,
        base_sources,
        head_sources,
        importers,
        referrers_for(git, change.head),
        spawners_for(git, change.head, importers),
    )
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
    git: Git,
    base: str,
    policy: Policy,
    backend: Backend,
    say: Callable[[str], None],
    on_test: TestProgress | None = None,
) -> tuple[ImpactMap | None, str]:
    """The base revision's map: from the cache, else built now when the policy allows; with its status."""
    environment = impactmap.environment_key(policy, backend)
    tree = impactmap.tree_of(git, base)
    cached = impactmap.load(git, tree, environment)
    if cached is not None:
        return cached, "cached"
    if policy.selection.map_build != "always":
        return None, f"not cached; the policy's selection.map_build is '{policy.selection.map_build}'"
    from verifier.selection import update

    earlier = update.ancestor_with_map(git, base, environment)
    if earlier is not None:
        say(f"updating the who-tests-what map of {earlier[0][:12]}: the tests the commits since can affect, at base")
        updated = update.update(
            git, earlier[0], earlier[1], base, policy, backend, environment, _tests_to_update(git, policy, base)
        )
        if updated is not None:
            impactmap.save(git, updated)
            return updated, "updated"
    say("building the who-tests-what map: the whole suite at base, under coverage")
    built, run = impactmap.build(git, base, policy, backend, environment, on_test)
    if built is None:
        return None, f"could not be built: at base, {RUN_STATUS_TEXT[run.status]}"
    impactmap.save(git, built)
    return built, "built"


def to_selection(picks: Picks, impact: ImpactMap | None, status: str, shard: tuple[int, int] | None) -> Selection:
    reasons = {key: tuple(value) for key, value in {**picks.node_ids, **picks.files}.items()}
    known = set(impact.outcomes) if impact else set()
    chosen = set(picks.node_ids) | (impact.tests_defined_in(picks.files) if impact else set())
    tests, files = counted(len(picks.node_ids), "test"), counted(len(picks.files), "test file")
    described = f"{tests} and {files} that can observe the change"
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


def _tests_to_update(git: Git, policy: Policy, base: str) -> PickTests:
    """What the map update re-runs: the tests the commits since the mapped ancestor can affect."""

    def pick(
        change: Change, old_map: ImpactMap, old_sources: Mapping[str, str], new_sources: Mapping[str, str]
    ) -> Picks | None:
        if whole_suite_trigger(change, policy):
            return None
        return plan(
            change, old_map, old_sources, new_sources, importers_for(git, change, policy), referrers_for(git, base)
        )

    return pick


def plan(
    change: Change,
    impact: ImpactMap | None,
    base_sources: Mapping[str, str],
    head_sources: Mapping[str, str],
    importers: Importers,
    referrers: Referrers = no_referrers,
    spawners: Spawners = no_spawners,
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
        _pick_for_file(picks, changed, impact, base_sources, head_sources, importers, referrers)
    if impact is not None:
        failing = [test for test, outcome in impact.outcomes.items() if outcome in ("failed", "error")]
        picks.add_tests(failing, "failed at base")
    touches_python = any(path.endswith(".py") for f in change.files for path in (f.path, f.old_path or ""))
    if touches_python and (picks.node_ids or picks.files):  # an empty selection runs every test anyway
        picks.add_files(spawners(), "starts processes, whose code the map cannot see")
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
    referrers: Referrers = no_referrers,
) -> None:
    base_path = changed.old_path or changed.path
    module = module_name(base_path)
    importing = _tests_among(importers("base", base_path))
    if impact is None or base_path not in impact.lines:
        why = "no map" if impact is None else "no test executed it at base"
        picks.add_files(importing, f"imports {module}, which the change touches ({why})")
        return
    if changed.status in ("deleted", "renamed"):
        picks.add_tests(impact.tests_in_file(base_path), f"ran {module}, which the change {changed.status}")
        picks.add_files(importing, f"imports {module}, which the change {changed.status}")
        if changed.status == "deleted":
            return
    base_text = base_sources.get(base_path, "")
    head_text = head_sources.get(changed.path, "")
    where = Where(base_path, changed.path, module, base_text, head_text)
    for scope in touched_scopes(changed, base_text, head_text):
        _pick_for_scope(picks, where, scope, impact, importing, referrers)


@dataclass(frozen=True)
class Where:
    """The changed file a scope belongs to: its base and head paths and texts, and its module name."""

    base_path: str
    head_path: str
    module: str
    base_text: str
    head_text: str


def _pick_for_scope(
    picks: Picks, where: Where, scope: Scope, impact: ImpactMap, importing: set[str], referrers: Referrers
) -> None:
    path, module = where.base_path, where.module
    if scope.function is not None:
        contexts = impact.contexts_in(path, range(scope.function.body_start, scope.function.end + 1))
        if IMPORT_TIME not in contexts:
            reason = f"ran {module}.{scope.function.name}, which the change modifies"
            picks.add_tests(impact.tests_for(contexts), reason)
            return
    if scope.new_definition and scope.new_name and _pick_for_new_definition(picks, where, scope, impact, referrers):
        return
    picks.add_tests(impact.tests_in_file(path), f"ran {module}, whose module-level code changes")
    picks.add_files(importing, f"imports {module}, whose module-level code changes")


def _pick_for_new_definition(picks: Picks, where: Where, scope: Scope, impact: ImpactMap, referrers: Referrers) -> bool:
    """A function or method the base lacks: the tests that ran its class (or its module) and the tests that
    mention its name. False when that cannot be trusted (then the wide module-level rule applies): a name
    Python calls implicitly (``__eq__``, ``__getattr__``), a name the base already binds there (the new
    definition replaces an import or an assignment), or a class no test ran a method of."""
    name = scope.new_name.rpartition(".")[2]
    owner = scope.owner
    if _is_special(name) or name in bound_names(where.base_text, owner.name if owner else None):
        return False
    if not plain_definition(where.head_text, scope.new_name):
        return False
    path, module = where.base_path, where.module
    if owner is not None:
        contexts = impact.contexts_in(path, range(owner.start, owner.end + 1)) - {IMPORT_TIME}
        reached = impact.tests_for(contexts)
        if not reached:
            return False
        picks.add_tests(reached, f"ran {module}.{owner.name}, which gets the new method {name}")
    else:
        picks.add_tests(impact.tests_in_file(path), f"ran {module}, which gets the new function {name}")
    _pick_referrers(picks, where, name, impact, referrers)
    return True


def _pick_referrers(picks: Picks, where: Where, name: str, impact: ImpactMap, referrers: Referrers) -> None:
    """The tests that can reach a new name by mentioning it: test files that name it run whole; a module
    that names it (an existing ``getattr(self, "name", None)``, a call written beside the new definition)
    brings the tests that ran it."""
    reason = f"mentions {name}, which the change adds"
    for path in sorted(referrers(name)):
        if is_test_file(path):
            picks.add_files([path], reason)
        elif path != where.head_path:
            picks.add_tests(impact.tests_in_file(path), f"ran {module_name(path)}, which {reason}")
    if mentions(where.head_text, name) > 1:  # the definition itself is one mention
        picks.add_tests(impact.tests_in_file(where.base_path), f"ran {where.module}, which {reason}")


# Decorators that only wrap the function they are given (Python's docs, "Built-in Functions"; functools, abc).
PLAIN_DECORATORS = frozenset({"property", "staticmethod", "classmethod", "cached_property", "abstractmethod"})


def plain_definition(source: str, qualified: str) -> bool:
    """Whether the definition ``qualified`` of ``source`` does nothing when Python runs its ``def`` or
    ``class`` statement but bind a name: no decorator (a registry may record it) but the plain wrappers,
    and for a class no base class, metaclass or keyword (``__init_subclass__`` may record it)."""
    try:
        tree = ast.parse(source)
    except (SyntaxError, ValueError):
        return False
    body: list[ast.stmt] = tree.body
    node: ast.stmt | None = None
    for part in qualified.split("."):
        node = next((n for n in body if isinstance(n, _DEFINITIONS) and n.name == part), None)
        if node is None:
            return False
        body = node.body
    assert isinstance(node, _DEFINITIONS)
    for decorator in node.decorator_list:
        named = decorator.attr if isinstance(decorator, ast.Attribute) else getattr(decorator, "id", None)
        if named not in PLAIN_DECORATORS:
            return False
    if isinstance(node, ast.ClassDef):
        simple_bases = all(isinstance(b, ast.Name) and b.id == "object" for b in node.bases)
        return simple_bases and not node.keywords
    return True


_DEFINITIONS = (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)


def _is_special(name: str) -> bool:
    return name.startswith("__") and name.endswith("__")


def bound_names(source: str, class_name: str | None) -> set[str]:
    """The names ``source`` binds at module level (``class_name`` None) or in one class's body: imports,
    assignments, definitions. None of them is new, even when the change adds a ``def`` of that name."""
    try:
        tree = ast.parse(source)
    except (SyntaxError, ValueError):
        return set()
    body: list[ast.stmt] = tree.body
    for part in (class_name or "").split(".") if class_name else ():
        found = next((n for n in body if isinstance(n, ast.ClassDef) and n.name == part), None)
        if found is None:
            return set()
        body = found.body
    names: set[str] = set()
    for statement in body:
        if isinstance(statement, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)):
            names.add(statement.name)
            continue
        for node in _walk_scope(statement):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)):
                names.add(node.name)
            elif isinstance(node, ast.alias):
                names.add((node.asname or node.name).split(".")[0])
            elif isinstance(node, ast.Name) and isinstance(node.ctx, ast.Store):
                names.add(node.id)
    return names


def _walk_scope(node: ast.AST) -> Iterable[ast.AST]:
    """``node`` and what it holds, without the bodies of the functions, classes and lambdas inside it
    (their names are bound in a scope of their own)."""
    yield node
    if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef, ast.Lambda)):
        return
    for child in ast.iter_child_nodes(node):
        yield from _walk_scope(child)


def mentions(source: str, name: str) -> int:
    """How often ``source`` mentions ``name``: as a name, an attribute, a definition or a string (``getattr``)."""
    try:
        tree = ast.parse(source)
    except (SyntaxError, ValueError):
        return 1 + source.count(name)  # unparsable: assume it does
    count = 0
    for node in ast.walk(tree):
        if (
            (isinstance(node, ast.Name) and node.id == name)
            or (isinstance(node, ast.Attribute) and node.attr == name)
            or (isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)) and node.name == name)
            or (isinstance(node, ast.Constant) and isinstance(node.value, str) and name in node.value)
            or (isinstance(node, ast.alias) and name in (node.name.split(".")[-1], node.asname))
            or (isinstance(node, ast.keyword) and node.arg == name)
        ):
            count += 1
    return count


SOURCE_ROOTS = ("src", "lib")  # the usual folders of a source layout, left out of a module's shown name


def module_name(path: str) -> str:
    """The dotted name a reader knows a file by (``src/parcelkit/rates.py`` -> ``parcelkit.rates``)."""
    dotted = dotted_name(path)
    first, _, rest = dotted.partition(".")
    return (rest if first in SOURCE_ROOTS and rest else dotted) or path


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
    new_name: str = ""  # the new definition's qualified name (empty: a new class, or not known)
    owner: Function | None = None  # the base class that gets the new method (None: a module-level one)


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
    enclosing function the base has; a function of its own that the base lacks is a new definition
    (of the base class that holds it, or of the module)."""
    if head_functions is None:
        return Scope(line)  # head does not parse: treat as module-level (code.syntax reports it)
    inner = innermost(head_functions, line)
    if inner is None:
        header = _new_header(head_functions, line, by_name)
        if header is None:
            return Scope(line)
        return _new_scope(line, header, by_name)
    name = inner.name
    while name:
        found = by_name.get(name)
        if found is not None and not found.is_class:
            return Scope(line, function=found)
        if found is not None:
            break
        name = name.rpartition(".")[0]
    return _new_scope(line, inner, by_name)


def _new_scope(line: int, inner: Function, by_name: Mapping[str, Function]) -> Scope:
    """The scope of a line of ``inner``, a head definition the base lacks: the outermost new definition
    around it, owned by the base class that holds it (or by the module)."""
    parts = inner.name.split(".")
    for depth in range(1, len(parts) + 1):
        prefix = ".".join(parts[:depth])
        if prefix not in by_name:
            owner = by_name.get(".".join(parts[: depth - 1])) if depth > 1 else None
            if owner is not None and not owner.is_class:
                return Scope(line, function=owner)
            return Scope(line, new_definition=True, new_name=prefix, owner=owner)
    return Scope(line, new_definition=True, new_name=inner.name)


def _new_header(head_functions: list[Function], line: int, by_name: Mapping[str, Function]) -> Function | None:
    """The head definition whose ``def`` or ``class`` line, decorators or (for a new class) body holds
    module-level ``line``, when the base does not have it; None for a line of existing code."""
    holding = [
        found
        for found in head_functions
        if found.start <= line <= found.end and (found.is_class or line < found.body_start)
    ]
    for found in sorted(holding, key=lambda f: f.start, reverse=True):  # the innermost first
        if found.is_class and line >= found.body_start and found.name in by_name:
            return None  # a statement of an existing class's body: a class attribute, run at import
        if line < found.body_start or found.is_class:
            return found if found.name not in by_name else None
    return None


def _unique(scopes: list[Scope]) -> list[Scope]:
    seen: set[tuple] = set()
    kept = []
    for scope in scopes:
        whole = scope.function is not None or scope.new_definition
        key = (scope.function, scope.new_definition, scope.new_name, scope.owner) if whole else (scope.changed_line,)
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


def importers_for(git: Git, change: Change, policy: Policy) -> Importers:
    from verifier.selection.imports import build_graph

    graphs: dict[str, ImportGraph] = {}

    def importers(side: str, path: str) -> set[str]:
        if side not in graphs:
            revision = change.base if side == "base" else change.head
            graphs[side] = _cached_graph(git, revision, lambda: build_graph(python_sources(git, revision)))
        return graphs[side].importers([path])

    return importers


def referrers_for(git: Git, head: str) -> Referrers:
    """Which head files mention a name (read in one batch, when a new definition first asks)."""
    sources: dict[str, str] = {}

    def referrers(name: str) -> set[str]:
        if not sources:
            sources.update(python_sources(git, head) or {"": ""})
        return {path for path, text in sources.items() if name in text and mentions(text, name)}

    return referrers


def spawners_for(git: Git, head: str | None, importers: Importers) -> Spawners:
    """Which test files of ``head`` start processes, themselves or through a helper of the test folders
    they import (read in one batch of the test side's files, when first asked)."""
    found: list[set[str]] = []

    def spawners() -> set[str]:
        if not found:
            sources = python_sources(git, head, keep=_test_side)
            starting = {path for path, text in sources.items() if starts_processes(text)}
            helpers = {test for path in starting - _tests_among(starting) for test in importers("head", path)}
            found.append(_tests_among(starting | helpers))
        return found[0]

    return spawners


TEST_FOLDERS = frozenset({"test", "tests", "testing"})
PROCESS_MODULES = frozenset({"subprocess", "multiprocessing", "pty"})
PROCESS_NAMES = frozenset({"create_subprocess_exec", "create_subprocess_shell", "ProcessPoolExecutor"})
OS_PROCESS_CALLS = ("system", "popen", "fork", "forkpty", "spawn", "exec", "posix_spawn")


def _test_side(path: str) -> bool:
    """A test file, a ``conftest.py`` or a helper in a test folder: the code that may start the processes."""
    return is_test_file(path) or path.rpartition("/")[2] == "conftest.py" or bool(TEST_FOLDERS & set(path.split("/")))


def starts_processes(source: str) -> bool:
    """Whether ``source`` may start a process (Python's docs: ``subprocess``, ``multiprocessing``, ``pty``,
    ``os``'s process functions, ``asyncio``'s subprocesses, ``concurrent.futures.ProcessPoolExecutor``;
    ``sys.executable``, what a test names to run Python again). Unparsable: assume it does."""
    try:
        tree = ast.parse(source)
    except (SyntaxError, ValueError):
        return True
    return any(_starts_a_process(node) for node in ast.walk(tree))


def _starts_a_process(node: ast.AST) -> bool:
    if isinstance(node, ast.Import):
        return any(alias.name.split(".")[0] in PROCESS_MODULES for alias in node.names)
    if isinstance(node, ast.ImportFrom):
        from_process_module = (node.module or "").split(".")[0] in PROCESS_MODULES
        return from_process_module or any(a.name in PROCESS_NAMES or a.name == "executable" for a in node.names)
    if isinstance(node, ast.Name):
        return node.id in PROCESS_NAMES
    return isinstance(node, ast.Attribute) and (node.attr in PROCESS_NAMES or _os_or_sys_process(node))


def _os_or_sys_process(node: ast.Attribute) -> bool:
    owner = node.value.id if isinstance(node.value, ast.Name) else None
    if owner == "sys":
        return node.attr == "executable"
    return owner == "os" and node.attr.startswith(OS_PROCESS_CALLS)


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


def python_sources(git: Git, revision: str | None, keep: Callable[[str], bool] = lambda _path: True) -> dict[str, str]:
    """Every Python file of ``revision`` (a commit, INDEX, or None for the empty tree) whose path ``keep``
    accepts, read in one batch."""
    if revision is None:
        return {}
    if revision == INDEX:
        names = git.run(["ls-files", "-z"]).decode("utf-8", "surrogateescape").split("\0")
        prefix = ":"
    else:
        listing = git.run(["ls-tree", "-r", "-z", "--name-only", revision])
        names = listing.decode("utf-8", "surrogateescape").split("\0")
        prefix = f"{revision}:"
    python = [name for name in names if name.endswith(".py") and keep(name)]
    blobs = git.read_blobs([f"{prefix}{name}" for name in python])
    return {name: blobs[f"{prefix}{name}"].decode("utf-8", "replace") for name in python if f"{prefix}{name}" in blobs}
