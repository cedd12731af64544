"""``tests.weakened``: a machine-written change that loosens the tests, found by comparing ASTs.

Each test function (``test_*`` at module level or in a class) at base is paired with the function of
the same qualified name at head, and the two are compared: assertions, skip and xfail markers, skip
calls, ``pytest.raises`` expectations, parametrize cases and the literals the assertions expect.
"""

from __future__ import annotations

import ast
import builtins
import functools
import weakref
from collections import Counter, deque
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field

from verifier.astnames import Names, canonical, is_literal, module_index, module_names, resolve, span, walk
from verifier.models import FileChange, Finding
from verifier.pathglob import PYTEST_FILES, pytest_collects_file
from verifier.rules import RuleContext, rule
from verifier.rules.machine import base_text, glob_matcher, head_text, machine_lines, machine_removed, option
from verifier.rules.testbody import RAISES_CALLS, Check, assertion_helpers, called_names, check_reads, checks_of
from verifier.words import counted, plural

RULE_ID = "tests.weakened"
DEFAULT_TEST_GLOBS = ["tests/**/*.py", "test/**/*.py", "**/test_*.py", "**/*_test.py"]
SKIP_MARKERS = frozenset(
    {
        "pytest.mark.skip",
        "pytest.mark.skipif",
        "pytest.mark.xfail",
        "unittest.skip",
        "unittest.skipIf",
        "unittest.skipUnless",
        "unittest.expectedFailure",
    }
)
SKIP_CALLS = frozenset({"pytest.skip", "pytest.xfail", "pytest.importorskip", "self.skipTest"})
# Exceptions that skip a test when raised (pytest documentation, skipping: unittest.SkipTest is honoured;
# pytest.skip.Exception is the class pytest.skip raises, from memory of pytest's outcomes module).
SKIP_EXCEPTIONS = frozenset(
    {"unittest.SkipTest", "unittest.case.SkipTest", "pytest.skip.Exception", "_pytest.outcomes.Skipped"}
)


# pytest's default ``python_files`` (pytest documentation, "Conventions for Python test discovery").
_UNSET = object()
_IGNORED_FIELDS = ("ctx", "kind", "type_comment")


@functools.cache
def _compared_fields(node_type: type) -> tuple[str, ...]:
    return tuple(name for name in node_type._fields if name not in _IGNORED_FIELDS)  # type: ignore[attr-defined]


def fingerprint(node: object, mask_constants: bool = False, mask_operators: bool = False) -> str:
    """A compact structural form of ``node`` without positions; constants become ``C`` when masked, and
    comparison operators and the names of ``assert*`` methods become ``O`` when those are masked."""
    if isinstance(node, ast.Constant):
        return "C" if mask_constants else f"({node.value!r})"
    if mask_operators and isinstance(node, ast.cmpop):
        return "O"
    if mask_operators and isinstance(node, ast.Attribute) and node.attr.startswith("assert"):
        return f"(Attribute {fingerprint(node.value, mask_constants, mask_operators)} O)"
    if isinstance(node, ast.AST):
        values = (getattr(node, name, _UNSET) for name in _compared_fields(type(node)))  # type: ignore[arg-type]  # an AST class is hashable
        fields = [fingerprint(value, mask_constants, mask_operators) for value in values if value is not _UNSET]
        return f"({type(node).__name__} {' '.join(fields)})"
    if isinstance(node, list):
        return "[" + ",".join([fingerprint(item, mask_constants, mask_operators) for item in node]) + "]"
    return repr(node)


# Fields that never hold a node that can hold an assertion or a call: names, flags, operators, contexts.
_LEAF_FIELDS = frozenset(
    {
        "ctx",
        "id",
        "attr",
        "arg",
        "name",
        "names",
        "asname",
        "module",
        "level",
        "kind",
        "type_comment",
        "op",
        "ops",
        "is_async",
        "conversion",
        "tag",
    }
)


@functools.cache
def _branch_fields(node_type: type) -> tuple[str, ...]:
    if issubclass(node_type, ast.Constant):
        return ()  # its value is data, never a node
    return tuple(name for name in node_type._fields if name not in _LEAF_FIELDS)  # type: ignore[attr-defined]


def _checks_in(node: ast.AST) -> list[ast.AST]:
    """The assertions, calls and raises of ``ast.walk(node)``, in the same order, in a cheaper loop that
    skips the fields that can hold none."""
    found: list[ast.AST] = []
    queue = deque([node])
    node_type, wanted = ast.AST, (ast.Assert, ast.Call, ast.Raise)
    while queue:
        node = queue.popleft()
        if isinstance(node, wanted):
            found.append(node)
        for name in _branch_fields(type(node)):  # type: ignore[arg-type]  # an AST class is hashable
            value = getattr(node, name, None)
            if isinstance(value, node_type):
                queue.append(value)
            elif isinstance(value, list):
                queue.extend([item for item in value if isinstance(item, node_type)])
    return found


@dataclass
class TestFunction:
    """What a test function checks, as far as weakening goes."""

    qualname: str
    node: ast.FunctionDef | ast.AsyncFunctionDef
    markers: dict[str, int] = field(default_factory=dict)  # skip/xfail marker -> line
    uncollected: str = ""  # why pytest does not collect it (empty: it does)
    checks: list[Check] = field(default_factory=list)  # every check, with whether it can fail the test
    asserts: list[ast.AST] = field(default_factory=list)  # the live checks' nodes: what can fail the test
    skip_calls: list[ast.Call | ast.Raise] = field(default_factory=list)
    raises: list[ast.Call] = field(default_factory=list)
    params: dict[str, tuple[int, int]] = field(default_factory=dict)  # argnames -> (case count, line)
    loaded: bool = False  # the body is read only for the functions the change touched


TestFunction.__test__ = False  # type: ignore[attr-defined]  # not a pytest test class


@dataclass
class TestModule:
    names: Names
    functions: dict[str, TestFunction]
    scope_markers: dict[str, dict[str, int]]  # "" (module) or class qualname -> skip marker -> line
    tree: ast.Module | None = None
    module_skips: list[ast.AST] = field(default_factory=list)  # skips at module level (every test skipped)
    fixtures: dict[str, ast.FunctionDef | ast.AsyncFunctionDef] = field(default_factory=dict)  # autouse ones
    definitions: dict[str, ast.FunctionDef | ast.AsyncFunctionDef] = field(default_factory=dict)  # module level

    @functools.cached_property
    def helpers(self) -> frozenset[str]:
        """Module functions that hold a live check (assertion helpers), read when a test body is."""
        return assertion_helpers(self.tree, self.names) if self.tree is not None else frozenset()


_read: weakref.WeakKeyDictionary[ast.Module, TestModule] = weakref.WeakKeyDictionary()


def read_module(tree: ast.Module, names: Names | None = None) -> TestModule:
    """The test functions of a module and what they check; read once per tree (the rules share the parse)."""
    kept = _read.get(tree)
    if kept is None:
        kept = _read[tree] = _read_module(tree, names or module_names(tree))
    return kept


def _read_module(tree: ast.Module, names: Names) -> TestModule:
    module = TestModule(names, {}, {"": _pytestmark(tree.body, names)}, tree)
    module.module_skips = [n for n in tree.body if _skip_at_module_level(n, names)]
    class_bodies = [s for n in tree.body if isinstance(n, ast.ClassDef) for s in n.body]
    module.fixtures = {
        n.name: n
        for n in [*tree.body, *class_bodies]
        if isinstance(n, (ast.FunctionDef, ast.AsyncFunctionDef)) and n.decorator_list and _is_autouse_fixture(n, names)
    }
    module.definitions = {n.name: n for n in tree.body if isinstance(n, (ast.FunctionDef, ast.AsyncFunctionDef))}
    disabled = _disabled_by_attribute(tree.body)
    _collect(tree.body, "", names, module, "", disabled)
    return module


def _collect(
    body: list[ast.stmt], prefix: str, names: Names, module: TestModule, outer: str, disabled: frozenset[str]
) -> None:
    """Every ``test*`` function of module or class bodies, with why pytest would not collect it (pytest
    documentation, "Conventions for Python test discovery": ``test`` prefixed functions at module level and
    in ``Test`` prefixed classes without an ``__init__`` method, or in ``unittest.TestCase`` subclasses; and,
    from memory of pytest's collector, an object whose ``__test__`` attribute is false is not collected)."""
    local_classes = {n.name: n for n in body if isinstance(n, ast.ClassDef)}
    for node in body:
        if isinstance(node, ast.ClassDef):
            qualname = f"{prefix}{node.name}"
            markers = {**_decorator_markers(node, names), **_pytestmark(node.body, names)}
            module.scope_markers[qualname] = markers
            reason = outer or _class_not_collected(node, names, local_classes, disabled)
            _collect(node.body, f"{qualname}.", names, module, reason, _disabled_by_attribute(node.body))
        elif (
            isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef))
            and node.name.startswith("test")
            and not _is_fixture(node, names)  # a fixture is no test, whatever its name
        ):
            qualname = f"{prefix}{node.name}"
            reason = outer or (f"{node.name}.__test__ is set to False" if node.name in disabled else "")
            module.functions[qualname] = TestFunction(qualname, node, _decorator_markers(node, names), reason)


def _class_not_collected(
    node: ast.ClassDef, names: Names, local_classes: dict[str, ast.ClassDef], disabled: frozenset[str]
) -> str:
    if "__test__" in _disabled_by_attribute(node.body, own=True) or node.name in disabled:
        return f"class {node.name} sets __test__ = False"
    if _is_unittest_case(node, names, local_classes, 0):
        return ""
    if not node.name.startswith("Test"):
        return f"class {node.name} does not start with 'Test'"
    if any(isinstance(n, ast.FunctionDef) and n.name == "__init__" for n in node.body):
        return f"class {node.name} has an __init__ (pytest does not collect such a class)"
    return ""


def _is_unittest_case(node: ast.ClassDef, names: Names, local_classes: dict[str, ast.ClassDef], depth: int) -> bool:
    for base in node.bases:
        meanings = [canonical(n) for n in resolve(base, names)]
        if any(m.startswith("unittest.") or m.endswith("TestCase") for m in meanings):
            return True
        local = local_classes.get(base.id) if isinstance(base, ast.Name) and depth < 10 else None
        if local is not None and _is_unittest_case(local, names, local_classes, depth + 1):
            return True
    return False


def _disabled_by_attribute(body: list[ast.stmt], own: bool = False) -> frozenset[str]:
    """Names given ``__test__ = False`` in ``body``: ``name.__test__ = False`` (or, with ``own``, the body's
    own ``__test__ = False``, returned as ``"__test__"``)."""
    found: set[str] = set()
    for node in body:
        if not (isinstance(node, ast.Assign) and isinstance(node.value, ast.Constant) and not node.value.value):
            continue
        for target in node.targets:
            if own and isinstance(target, ast.Name) and target.id == "__test__":
                found.add("__test__")
            if isinstance(target, ast.Attribute) and target.attr == "__test__" and isinstance(target.value, ast.Name):
                found.add(target.value.id)
    return frozenset(found)


def _skip_at_module_level(node: ast.stmt, names: Names) -> bool:
    """``pytest.skip(..., allow_module_level=True)``, ``pytest.importorskip(...)``, ``raise unittest.SkipTest``
    as a module-level statement (also inside a module-level ``if`` or ``try``)."""
    if isinstance(node, (ast.Import, ast.ImportFrom, ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)):
        return False
    for child in walk(node):
        if isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef, ast.Lambda)):
            return False
        if isinstance(child, ast.Call) and any(n in SKIP_CALLS for n in called_names(child, names)):
            return True
        if isinstance(child, ast.Raise) and _raises_skip(child, names):
            return True
    return False


def _raises_skip(node: ast.Raise, names: Names) -> bool:
    exc = node.exc.func if isinstance(node.exc, ast.Call) else node.exc
    return exc is not None and any(n in SKIP_EXCEPTIONS for n in called_names(exc, names))


def _is_fixture(node: ast.FunctionDef | ast.AsyncFunctionDef, names: Names) -> bool:
    return any("pytest.fixture" in _names_of(d, names) for d in node.decorator_list)


def _is_autouse_fixture(node: ast.FunctionDef | ast.AsyncFunctionDef, names: Names) -> bool:
    for decorator in node.decorator_list:
        if isinstance(decorator, ast.Call) and "pytest.fixture" in called_names(decorator, names):
            autouse = _keyword(decorator, "autouse")
            if autouse is not None and not (isinstance(autouse, ast.Constant) and not autouse.value):
                return True
    return False


def _names_of(node: ast.expr, names: Names) -> tuple[str, ...]:
    return called_names(node, names)


def _decorator_markers(node: ast.ClassDef | ast.FunctionDef | ast.AsyncFunctionDef, names: Names) -> dict[str, int]:
    found: dict[str, int] = {}
    for decorator in node.decorator_list:
        for name in _names_of(decorator, names):
            if name in SKIP_MARKERS:
                found.setdefault(name, decorator.lineno)
    return found


def _pytestmark(body: list[ast.stmt], names: Names) -> dict[str, int]:
    """Skip markers set by ``pytestmark = ...`` (a marker or a list of them) in a module or class body."""
    found: dict[str, int] = {}
    for node in body:
        if isinstance(node, ast.Assign) and any(isinstance(t, ast.Name) and t.id == "pytestmark" for t in node.targets):
            values = node.value.elts if isinstance(node.value, (ast.List, ast.Tuple)) else [node.value]
            for value in values:
                for name in _names_of(value, names):
                    if name in SKIP_MARKERS:
                        found.setdefault(name, value.lineno)
    return found


def load(function: TestFunction, module: TestModule) -> TestFunction:
    """Read what the function checks (once): its checks and which can fail, skips, raises, parametrize cases."""
    if function.loaded:
        return function
    function.loaded = True
    names = module.names
    node = function.node
    for decorator in node.decorator_list:
        if isinstance(decorator, ast.Call) and "pytest.mark.parametrize" in _names_of(decorator, names):
            _read_parametrize(decorator, function)
    function.checks = checks_of(node, names, module.helpers)
    function.asserts = [c.node for c in function.checks if c.live]
    for child in _checks_in(node):
        if isinstance(child, ast.Raise) and _raises_skip(child, names):
            function.skip_calls.append(child)
        elif isinstance(child, ast.Call):
            called = _names_of(child, names)
            if any(n in SKIP_CALLS for n in called):
                function.skip_calls.append(child)
            if any(n in RAISES_CALLS for n in called):
                function.raises.append(child)
    for found in (function.skip_calls, function.raises):
        found.sort(key=lambda n: (n.lineno, n.col_offset))  # source order: pairs base and head by position
    return function


def _read_parametrize(decorator: ast.Call, function: TestFunction) -> None:
    argnames = decorator.args[0] if decorator.args else _keyword(decorator, "argnames")
    argvalues = decorator.args[1] if len(decorator.args) > 1 else _keyword(decorator, "argvalues")
    if argnames is not None and isinstance(argvalues, (ast.List, ast.Tuple)):
        function.params[fingerprint(argnames)] = (len(argvalues.elts), decorator.lineno)


def _keyword(call: ast.Call, name: str) -> ast.expr | None:
    return next((k.value for k in call.keywords if k.arg == name), None)


# --- the rule -----------------------------------------------------------------------------------------


@rule(
    RULE_ID,
    default="block",
    summary="the change loosens the tests (deleted tests, skips, weaker asserts)",
    stage="static",
    options={"test_paths": list(DEFAULT_TEST_GLOBS), "changed_expectations": True},
    sources=(
        "Python docs: Built-in Exceptions, Exception hierarchy (for widened pytest.raises)",
        "pytest documentation: skip and xfail; parametrizing tests",
    ),
)
def weakened_tests(context: RuleContext) -> Iterator[Finding]:
    """A machine-written change must not make the tests easier to pass. Compared between base and head,
    test function by test function, counting only the checks that can fail the test (reachable, not
    swallowed, not fixed in the source): deleted test functions or test files; fewer such checks (an
    assertion removed, wrapped in a try/except that ignores it, given ``or True``, moved after a
    ``return``, into a nested function never called or under ``if False:``); a comparison flipped
    (``==`` to ``!=``, ``assertNotEqual`` to ``assertEqual``); new skip or xfail markers (on the
    function, its class, or ``pytestmark``), skip calls or raised skip exceptions, module-level skips,
    autouse fixtures that skip; tests no longer collected (class renamed away from ``Test*``, given an
    ``__init__`` or ``__test__ = False``, a file renamed outside ``test_*.py``/``*_test.py``), a decorator
    that never runs the test; ``pytest.raises`` widened or its ``match`` dropped; fewer parametrize cases.
    A changed expected literal, or a decorator the gate cannot see into, is a warning (it may be a
    legitimate fix). Restore the test, or have a human review and make the change."""
    is_test = glob_matcher(tuple(option(context, RULE_ID, "test_paths")))
    for file in context.change.files:
        at_base = file.old_path is not None and is_test(file.old_path)
        at_head = file.status != "deleted" and is_test(file.path)
        if (at_base or at_head) and file.path.endswith(".py"):
            yield from _compare_file(context, file, at_base, at_head)


def _compare_file(context: RuleContext, file: FileChange, at_base: bool, at_head: bool) -> Iterator[Finding]:
    removed_by_machine = machine_removed(context, file)
    if not removed_by_machine and not machine_lines(context, file.path):
        return  # every finding below needs a line a model added or may have removed
    base_source = base_text(context, file) if at_base else None
    head_source = head_text(context, file) if at_head else None
    # kept: the test-strength rules (verifier.rules.strength, registered after this one) read the same files
    base_index = module_index(base_source, file.old_path or file.path) if base_source is not None else None
    head_index = module_index(head_source, file.path) if head_source is not None else None
    base = read_module(base_index.tree, base_index.names) if base_index is not None else None
    if base is not None and base.functions and head_source is None and removed_by_machine:
        yield Finding(
            RULE_ID,
            "block",
            f"test file deleted ({counted(len(base.functions), 'test function')})",
            path=file.path,
            details={"functions": sorted(base.functions)},
        )
        return
    if base is not None and file.old_path and removed_by_machine and file.old_path != file.path:
        count = sum(1 for f in base.functions.values() if not f.uncollected)
        if count and pytest_collects_file(file.old_path) and not pytest_collects_file(file.path):
            yield Finding(
                RULE_ID,
                "block",
                f"test file renamed from {file.old_path} to a name pytest does not collect: "
                f"its {counted(count, 'test')} no longer {plural(count, 'runs', 'run')} "
                f"(pytest's default python_files: {' '.join(PYTEST_FILES)})",
                path=file.path,
            )
            return
    if head_index is None:
        return
    head = read_module(head_index.tree, head_index.names)
    added = frozenset(machine_lines(context, file.path))
    removed = frozenset(file.removed_lines) if removed_by_machine else frozenset()
    comparison = _FileComparison(
        file.path, base, head, added, removed, option(context, RULE_ID, "changed_expectations")
    )
    yield from comparison.findings()


@dataclass
class _FileComparison:
    path: str
    base: TestModule | None
    head: TestModule
    added: frozenset[int]  # head lines a model wrote
    removed: frozenset[int]  # base lines a model may have removed

    report_expectations: bool

    def finding(self, message: str, line: int | None, **details: object) -> Finding:
        return Finding(RULE_ID, "block", message, path=self.path, line=line, details=dict(details))

    def findings(self) -> Iterator[Finding]:
        if self.base is None:
            return
        base_functions = self.base.functions
        yield from self._collection(base_functions)
        yield from self._scope_markers()
        yield from self._module_skips()
        yield from self._skipping_fixtures()
        for qualname, now in self.head.functions.items():
            before = base_functions.get(qualname)
            if before is not None and self._touched(before, now):
                yield from self._compare_function(before, now)

    def _touched(self, before: TestFunction, now: TestFunction) -> bool:
        return any(n in self.added for n in _lines(now.node)) or any(n in self.removed for n in _lines(before.node))

    def _collection(self, base_functions: dict[str, TestFunction]) -> Iterator[Finding]:
        """Tests pytest collected at base that are gone at head, or still there but no longer collected."""
        head = self.head.functions
        collected_now = {n for n, f in head.items() if not f.uncollected}
        new_bodies = {fingerprint(f.node.body): f for n, f in head.items() if n not in base_functions}
        for qualname, function in base_functions.items():
            if function.uncollected or qualname in collected_now:
                continue
            same_name = head.get(qualname)
            moved = new_bodies.get(fingerprint(function.node.body))
            if same_name is not None and same_name.uncollected:
                yield self.finding(
                    f"test {qualname} is no longer collected: {same_name.uncollected}", same_name.node.lineno
                )
            elif moved is not None and moved.uncollected:
                yield self.finding(
                    f"test {qualname} moved to {moved.qualname}, which is not collected: {moved.uncollected}",
                    moved.node.lineno,
                )
            elif moved is None and same_name is None and any(n in self.removed for n in _lines(function.node)):
                yield self.finding(f"test function {qualname} deleted", None, base_line=function.node.lineno)

    def _scope_markers(self) -> Iterator[Finding]:
        assert self.base is not None
        for scope, markers in self.head.scope_markers.items():
            before = self.base.scope_markers.get(scope)
            if before is None:
                continue
            for marker, line in markers.items():
                if marker not in before and line in self.added:
                    where = f"class {scope}" if scope else "the module"
                    yield self.finding(f"{marker} added to {where}: its tests no longer count", line)

    def _module_skips(self) -> Iterator[Finding]:
        assert self.base is not None
        for node in _new_items(self.base.module_skips, self.head.module_skips):
            if any(n in self.added for n in span(node)):
                yield self.finding("module-level skip added: every test of the file is skipped", node.lineno)

    def _skipping_fixtures(self) -> Iterator[Finding]:
        assert self.base is not None
        for name, fixture in self.head.fixtures.items():
            skips = [
                n
                for n in ast.walk(fixture)
                if (isinstance(n, ast.Call) and any(m in SKIP_CALLS for m in _names_of(n, self.head.names)))
                or (isinstance(n, ast.Raise) and _raises_skip(n, self.head.names))
            ]
            old = self.base.fixtures.get(name)
            old_skips = [] if old is None else [n for n in ast.walk(old) if isinstance(n, (ast.Call, ast.Raise))]
            fresh = [n for n in _new_items(old_skips, skips) if any(m in self.added for m in span(n))]
            if fresh or (skips and old is None and any(n in self.added for n in _lines(fixture))):
                line = (fresh or skips)[0].lineno
                yield self.finding(f"autouse fixture {name} skips: every test that uses it is skipped", line)

    def _compare_function(self, before: TestFunction, now: TestFunction) -> Iterator[Finding]:
        assert self.base is not None
        load(before, self.base)
        load(now, self.head)
        name = now.qualname
        for marker, line in now.markers.items():
            if marker not in before.markers:
                yield self.finding(f"{marker} added to {name}", line)
        yield from self._decorators(before, now)
        skips = _new_items(before.skip_calls, now.skip_calls)
        for call in skips:
            yield self.finding(f"skip added to {name}", call.lineno)
        yield from self._lost_checks(before, now, frozenset(call.lineno for call in skips))
        yield from self._raises(before, now)
        for argnames, (count, line) in now.params.items():
            old = before.params.get(argnames)
            if old is not None and count < old[0]:
                yield self.finding(f"{name}: parametrize cases cut from {old[0]} to {count}", line)
        yield from self._changed_expectations(before, now)
        if self.report_expectations:
            yield from self._changed_expected_variables(before, now)

    def _changed_expected_variables(self, before: TestFunction, now: TestFunction) -> Iterator[Finding]:
        """``expected = 5.70`` becoming ``expected = 6.00`` where a check reads ``expected``: the usual way to
        hold an expected value, and a changed expectation like a changed literal in the assertion (warns)."""
        old = _literal_assignments(before.node)
        changed = {
            name: (value, line, old[name][0])
            for name, (value, line) in _literal_assignments(now.node).items()
            if name in old and old[name][0] != value and line in self.added
        }
        read = check_reads(now.node, self.head.names) if changed else frozenset()
        for name, (value, line, previous) in changed.items():
            if name in read:
                yield Finding(
                    RULE_ID,
                    "warn",
                    f"{now.qualname}: expected value changed ({name}: {previous} -> {value})",
                    self.path,
                    line,
                    {"max_severity": "warn"},
                )

    def _lost_checks(self, before: TestFunction, now: TestFunction, skips: frozenset[int]) -> Iterator[Finding]:
        """Fewer checks that can fail the test: each one the change made dead, then the ones removed (a
        new skip that makes the rest unreachable is reported as the skip)."""
        lost = len(before.asserts) - len(now.asserts)
        if lost <= 0 or skips:
            return
        dead = [c for c in now.checks if not c.live and (c.line in self.added or c.cause in self.added)]
        for check in dead[:lost]:
            yield self.finding(
                f"{now.qualname}: the assertion on line {check.line} can no longer fail ({check.why})",
                check.line,
                status=check.status,
            )
        if lost > len(dead):
            count = lost - len(dead)
            yield self.finding(
                f"{now.qualname}: {count} of {counted(len(before.asserts), 'assertion')} removed", now.node.lineno
            )

    def _decorators(self, before: TestFunction, now: TestFunction) -> Iterator[Finding]:
        """A decorator added to an existing test can replace it by anything; known testing libraries' are fine."""
        # compared by what they name: a decorator whose arguments changed (more parametrize cases) is not new
        assert self.base is not None
        old = Counter(_names_of(d, self.base.names) for d in before.node.decorator_list)
        for decorator in now.node.decorator_list:
            meanings = _names_of(decorator, self.head.names)
            if old[meanings]:
                old[meanings] -= 1
                continue
            if not any(n in self.added for n in span(decorator)):
                continue
            if any(m.startswith(_KNOWN_DECORATORS) for m in meanings):
                continue
            local = next((m.removeprefix("<local>.") for m in meanings if m.startswith("<local>.")), None)
            definition = self.head.definitions.get(local or "")
            if definition is not None and _runs_its_argument(definition):
                continue
            text = ast.unparse(decorator)
            if definition is not None:
                yield self.finding(f"decorator @{text} added to {now.qualname} never runs the test", decorator.lineno)
            else:
                finding = self.finding(
                    f"decorator @{text} added to {now.qualname}: the gate cannot see whether it still runs the test",
                    decorator.lineno,
                )
                yield Finding(
                    finding.rule, "warn", finding.message, finding.path, finding.line, {"max_severity": "warn"}
                )

    def _raises(self, before: TestFunction, now: TestFunction) -> Iterator[Finding]:
        for old, new in zip(before.raises, now.raises, strict=False):
            old_types = _exception_types(_expected(old), self.base.names if self.base else self.head.names)
            new_types = _exception_types(_expected(new), self.head.names)
            broader = _widened(old_types, new_types)
            if broader:
                yield self.finding(f"{now.qualname}: pytest.raises widened to {broader}", new.lineno)
            if _keyword(old, "match") is not None and _keyword(new, "match") is None:
                yield self.finding(f"{now.qualname}: pytest.raises no longer checks the message (match=)", new.lineno)

    def _changed_expectations(self, before: TestFunction, now: TestFunction) -> Iterator[Finding]:
        """An existing assertion of the same shape with another comparison (blocks) or other literals (warns)."""
        shapes: dict[int, str] = {}  # id -> fingerprint, each assertion's computed once (all stay alive here)

        def shape(node: ast.AST) -> str:
            found = shapes.get(id(node))
            if found is None:
                found = shapes[id(node)] = fingerprint(node)
            return found

        new_asserts = _new_items(before.asserts, now.asserts, shape)
        old_asserts = _new_items(now.asserts, before.asserts, shape)
        old_by_shape = {fingerprint(a, True, True): a for a in old_asserts}
        for node in new_asserts:
            old = old_by_shape.pop(fingerprint(node, True, True), None)
            if old is None or node.lineno not in self.added:
                continue
            flipped = _operator_change(old, node)
            if flipped:
                yield self.finding(f"{now.qualname}: the assertion's comparison changed ({flipped})", node.lineno)
            elif self.report_expectations:
                change = _constant_change(old, node)
                finding = self.finding(f"{now.qualname}: expected value changed ({change})", node.lineno)
                yield Finding(
                    finding.rule, "warn", finding.message, finding.path, finding.line, {"max_severity": "warn"}
                )


_KNOWN_DECORATORS = ("pytest.", "unittest.", "mock.", "hypothesis.", "pytest_", "freezegun.", "functools.wraps")
_OPERATORS = {
    ast.Eq: "==",
    ast.NotEq: "!=",
    ast.Lt: "<",
    ast.LtE: "<=",
    ast.Gt: ">",
    ast.GtE: ">=",
    ast.Is: "is",
    ast.IsNot: "is not",
    ast.In: "in",
    ast.NotIn: "not in",
}


def _literal_assignments(function: ast.FunctionDef | ast.AsyncFunctionDef) -> dict[str, tuple[str, int]]:
    """``name = <literal>`` statements of the function's own body: name -> (the literal's source, line)."""
    found: dict[str, tuple[str, int]] = {}
    for statement in function.body:
        if isinstance(statement, ast.Assign) and len(statement.targets) == 1 and is_literal(statement.value):
            target = statement.targets[0]
            if isinstance(target, ast.Name):
                found[target.id] = (ast.unparse(statement.value), statement.lineno)
    return found


def _operator_change(old: ast.AST, new: ast.AST) -> str:
    """``== -> !=`` or ``assertNotEqual -> assertEqual`` when the two differ in comparisons; else ''."""
    old_ops = [_OPERATORS[type(o)] for n in ast.walk(old) if isinstance(n, ast.Compare) for o in n.ops]
    new_ops = [_OPERATORS[type(o)] for n in ast.walk(new) if isinstance(n, ast.Compare) for o in n.ops]
    old_ops += [n.attr for n in ast.walk(old) if isinstance(n, ast.Attribute) and n.attr.startswith("assert")]
    new_ops += [n.attr for n in ast.walk(new) if isinstance(n, ast.Attribute) and n.attr.startswith("assert")]
    pairs = [f"{a} -> {b}" for a, b in zip(old_ops, new_ops, strict=False) if a != b]
    return ", ".join(pairs)


def _runs_its_argument(definition: ast.FunctionDef | ast.AsyncFunctionDef) -> bool:
    """A decorator that calls or returns the function it is given (directly or from a wrapper it returns)."""
    if not definition.args.args:
        return True  # a decorator factory or something else: not a no-op we can prove
    wrapped = definition.args.args[0].arg
    for node in ast.walk(definition):
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id == wrapped:
            return True
        if isinstance(node, ast.Return) and isinstance(node.value, ast.Name) and node.value.id == wrapped:
            return True
    return False


def _lines(node: ast.FunctionDef | ast.AsyncFunctionDef) -> range:
    """The lines of a function with its decorators (``lineno`` is the ``def`` line)."""
    first = min([d.lineno for d in node.decorator_list] + [node.lineno])
    return range(first, span(node).stop)


def _new_items(before: list, now: list, shape: Callable[[ast.AST], str] = fingerprint) -> list:
    """The nodes of ``now`` with no structurally equal counterpart in ``before`` (as a multiset)."""
    remaining = Counter(shape(n) for n in before)
    fresh = []
    for node in now:
        key = shape(node)
        if remaining[key]:
            remaining[key] -= 1
        else:
            fresh.append(node)
    return fresh


def _constant_change(old: ast.AST, new: ast.AST) -> str:
    olds = [n.value for n in ast.walk(old) if isinstance(n, ast.Constant)]
    news = [n.value for n in ast.walk(new) if isinstance(n, ast.Constant)]
    pairs = [f"{a!r} -> {b!r}" for a, b in zip(olds, news, strict=False) if a != b or type(a) is not type(b)]
    return ", ".join(pairs[:3]) or "literals changed"


def _expected(call: ast.Call) -> ast.expr | None:
    return call.args[0] if call.args else _keyword(call, "expected_exception")


def _exception_types(node: ast.expr | None, names: Names) -> list[type | None]:
    """The builtin exception classes ``node`` names; None stands for a class we cannot resolve."""
    if node is None:
        return []
    items = node.elts if isinstance(node, ast.Tuple) else [node]
    found: list[type | None] = []
    for item in items:
        meanings = {canonical(n) for n in resolve(item, names)}
        cls = next((getattr(builtins, m) for m in meanings if isinstance(getattr(builtins, m, None), type)), None)
        found.append(cls if cls is not None and issubclass(cls, BaseException) else None)
    return found


def _widened(old: list[type | None], new: list[type | None]) -> str | None:
    """The name of a class in ``new`` strictly broader than what ``old`` expected, else None.

    An unresolved (project) exception counts as a subclass of Exception, as every user-defined
    exception should be (Python docs, Built-in Exceptions: "user-defined exceptions should also be
    derived from this class")."""
    if not old or not new:
        return None
    for cls in new:
        if cls is None:
            continue
        narrower = [c if c is not None else Exception for c in old]
        covered = any(issubclass(cls, c) for c in narrower)
        if not covered and any(issubclass(c, cls) and c is not cls for c in narrower):
            return cls.__name__
        if cls in (Exception, BaseException) and None in old:
            return cls.__name__
    return None
