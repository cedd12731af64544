"""``tests.weakened``: a machine-written change that loosens the tests, found by comparing ASTs.

Each test function (``test_*`` at module level or in a class) at base is paired with the function of
the same qualified name at head, and the two are compared: assertions, skip and xfail markers, skip
calls, ``pytest.raises`` expectations, parametrize cases and the literals the assertions expect.
"""

from __future__ import annotations

import ast
import builtins
import functools
from collections import Counter, deque
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field

from verifier.astnames import Names, canonical, module_index, module_names, resolve, span
from verifier.models import FileChange, Finding
from verifier.rules import RuleContext, rule
from verifier.rules.machine import base_text, glob_matcher, head_text, machine_lines, machine_removed, option

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
RAISES_CALLS = frozenset({"pytest.raises", "self.assertRaises", "self.assertRaisesRegex"})
_SAME_VALUE_OPS = (ast.Eq, ast.Is, ast.LtE, ast.GtE)


_UNSET = object()
_IGNORED_FIELDS = ("ctx", "kind", "type_comment")


@functools.cache
def _compared_fields(node_type: type) -> tuple[str, ...]:
    return tuple(name for name in node_type._fields if name not in _IGNORED_FIELDS)  # type: ignore[attr-defined]


def fingerprint(node: object, mask_constants: bool = False) -> str:
    """A compact structural form of ``node`` without positions; constants become ``C`` when masked."""
    if isinstance(node, ast.Constant):
        return "C" if mask_constants else f"({node.value!r})"
    if isinstance(node, ast.AST):
        values = (getattr(node, name, _UNSET) for name in _compared_fields(type(node)))
        fields = [fingerprint(value, mask_constants) for value in values if value is not _UNSET]
        return f"({type(node).__name__} {' '.join(fields)})"
    if isinstance(node, list):
        return "[" + ",".join([fingerprint(item, mask_constants) for item in node]) + "]"
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
    """The assertions and calls of ``ast.walk(node)``, in the same order, in a cheaper loop that skips
    the fields that can hold neither."""
    found: list[ast.AST] = []
    queue = deque([node])
    node_type, wanted = ast.AST, (ast.Assert, ast.Call)
    while queue:
        node = queue.popleft()
        if isinstance(node, wanted):
            found.append(node)
        for name in _branch_fields(type(node)):
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
    asserts: list[ast.AST] = field(default_factory=list)
    skip_calls: list[ast.Call] = field(default_factory=list)
    raises: list[ast.Call] = field(default_factory=list)
    params: dict[str, tuple[int, int]] = field(default_factory=dict)  # argnames -> (case count, line)
    loaded: bool = False  # the body is read only for the functions the change touched


TestFunction.__test__ = False  # type: ignore[attr-defined]  # not a pytest test class


@dataclass
class TestModule:
    names: Names
    functions: dict[str, TestFunction]
    scope_markers: dict[str, dict[str, int]]  # "" (module) or class qualname -> skip marker -> line


def read_module(tree: ast.Module, names: Names | None = None) -> TestModule:
    names = names or module_names(tree)
    module = TestModule(names, {}, {"": _pytestmark(tree.body, names)})
    _collect(tree.body, "", names, module)
    return module


def _collect(body: list[ast.stmt], prefix: str, names: Names, module: TestModule) -> None:
    for node in body:
        if isinstance(node, ast.ClassDef):
            qualname = f"{prefix}{node.name}"
            markers = {**_decorator_markers(node, names), **_pytestmark(node.body, names)}
            module.scope_markers[qualname] = markers
            _collect(node.body, f"{qualname}.", names, module)
        elif isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)) and node.name.startswith("test"):
            qualname = f"{prefix}{node.name}"
            module.functions[qualname] = TestFunction(qualname, node, _decorator_markers(node, names))


def _names_of(node: ast.expr, names: Names) -> tuple[str, ...]:
    target = node.func if isinstance(node, ast.Call) else node
    return tuple(canonical(n) for n in resolve(target, names))


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


def load(function: TestFunction, names: Names) -> TestFunction:
    """Read what the function checks (once): assertions, skip calls, raises, parametrize cases."""
    if function.loaded:
        return function
    function.loaded = True
    node = function.node
    for decorator in node.decorator_list:
        if isinstance(decorator, ast.Call) and "pytest.mark.parametrize" in _names_of(decorator, names):
            _read_parametrize(decorator, function)
    for child in _checks_in(node):
        if isinstance(child, ast.Assert):
            function.asserts.append(child)
        elif isinstance(child, ast.Call):
            called = _names_of(child, names)
            if any(n in SKIP_CALLS for n in called):
                function.skip_calls.append(child)
            if any(n in RAISES_CALLS for n in called):
                function.raises.append(child)
                function.asserts.append(child)
            elif any(n.rsplit(".", 1)[-1].startswith("assert") for n in called):
                function.asserts.append(child)
    for found in (function.asserts, function.skip_calls, function.raises):
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
    test function by test function: deleted test functions or test files, fewer assertions, new skip or
    xfail markers (on the function, its class, or ``pytestmark``), new ``pytest.skip()``-like calls,
    assertions that cannot fail (``assert True``, ``assert x == x``), ``pytest.raises`` widened to a
    broader exception (by the builtin exception hierarchy) or with its ``match`` dropped, and fewer
    parametrize cases block; a changed expected literal in an existing assertion is a warning (it may be
    a legitimate fix). Restore the test, or have a human review and make the change."""
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
    # keep=False: only this rule reads most test files (calls.banned, which runs first, shares its index)
    base_index = module_index(base_source, file.old_path or file.path, keep=False) if base_source is not None else None
    head_index = module_index(head_source, file.path, keep=False) if head_source is not None else None
    base = read_module(base_index.tree, base_index.names) if base_index is not None else None
    if base is not None and base.functions and head_source is None and removed_by_machine:
        yield Finding(
            RULE_ID,
            "block",
            f"test file deleted ({len(base.functions)} test functions)",
            path=file.path,
            details={"functions": sorted(base.functions)},
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
        base_functions = self.base.functions if self.base else {}
        yield from self._trivial_asserts(base_functions)
        if self.base is None:
            return
        yield from self._deleted(base_functions)
        yield from self._scope_markers()
        for qualname, now in self.head.functions.items():
            before = base_functions.get(qualname)
            if before is not None and self._touched(before, now):
                yield from self._compare_function(before, now)

    def _touched(self, before: TestFunction, now: TestFunction) -> bool:
        return any(n in self.added for n in _lines(now.node)) or any(n in self.removed for n in _lines(before.node))

    def _deleted(self, base_functions: dict[str, TestFunction]) -> Iterator[Finding]:
        gone = [f for name, f in base_functions.items() if name not in self.head.functions]
        new_bodies = {fingerprint(f.node.body) for n, f in self.head.functions.items() if n not in base_functions}
        for function in gone:
            renamed = fingerprint(function.node.body) in new_bodies
            if not renamed and any(n in self.removed for n in _lines(function.node)):
                yield self.finding(f"test function {function.qualname} deleted", None, base_line=function.node.lineno)

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

    def _compare_function(self, before: TestFunction, now: TestFunction) -> Iterator[Finding]:
        assert self.base is not None
        load(before, self.base.names)
        load(now, self.head.names)
        name = now.qualname
        for marker, line in now.markers.items():
            if marker not in before.markers:
                yield self.finding(f"{marker} added to {name}", line)
        for call in _new_items(before.skip_calls, now.skip_calls):
            yield self.finding(f"skip call added to {name}", call.lineno)
        if len(now.asserts) < len(before.asserts):
            yield self.finding(
                f"{name}: {len(before.asserts) - len(now.asserts)} of {len(before.asserts)} assertions removed",
                now.node.lineno,
            )
        yield from self._raises(before, now)
        for argnames, (count, line) in now.params.items():
            old = before.params.get(argnames)
            if old is not None and count < old[0]:
                yield self.finding(f"{name}: parametrize cases cut from {old[0]} to {count}", line)
        if self.report_expectations:
            yield from self._changed_expectations(before, now)

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
        shapes: dict[int, str] = {}  # id -> fingerprint, each assertion's computed once (all stay alive here)

        def shape(node: ast.AST) -> str:
            found = shapes.get(id(node))
            if found is None:
                found = shapes[id(node)] = fingerprint(node)
            return found

        new_asserts = _new_items(before.asserts, now.asserts, shape)
        old_asserts = _new_items(now.asserts, before.asserts, shape)
        old_by_shape = {fingerprint(a, True): a for a in old_asserts}
        for node in new_asserts:
            old = old_by_shape.pop(fingerprint(node, True), None)
            if old is not None and node.lineno in self.added:
                change = _constant_change(old, node)
                finding = self.finding(f"{now.qualname}: expected value changed ({change})", node.lineno)
                yield Finding(
                    finding.rule, "warn", finding.message, finding.path, finding.line, {"max_severity": "warn"}
                )

    def _trivial_asserts(self, base_functions: dict[str, TestFunction]) -> Iterator[Finding]:
        for qualname, function in self.head.functions.items():
            if not any(n in self.added for n in _lines(function.node)):
                continue
            load(function, self.head.names)
            before = base_functions.get(qualname)
            if before is not None and self.base is not None:
                load(before, self.base.names)
            old = {fingerprint(a) for a in before.asserts if _is_trivial(a)} if before else set()
            for node in function.asserts:
                if _is_trivial(node) and node.lineno in self.added and fingerprint(node) not in old:
                    yield self.finding(f"{qualname}: assertion that cannot fail", node.lineno)


def _lines(node: ast.FunctionDef | ast.AsyncFunctionDef) -> range:
    """The lines of a function with its decorators (``lineno`` is the ``def`` line)."""
    first = min([d.lineno for d in node.decorator_list] + [node.lineno])
    return range(first, span(node).stop)


def _new_items(before: list, now: list, shape: Callable[[ast.AST], str] = fingerprint) -> list:  # type: ignore[type-arg]
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


def _is_trivial(node: ast.AST) -> bool:
    """``assert True``, ``assert 1``, ``assert "text"``, ``assert x == x``, ``self.assertTrue(True)``."""
    if isinstance(node, ast.Assert):
        test = node.test
        if isinstance(test, ast.Constant):
            return bool(test.value)
        return (
            isinstance(test, ast.Compare)
            and len(test.ops) == 1
            and isinstance(test.ops[0], _SAME_VALUE_OPS)
            and _same_shape(test.left, test.comparators[0])
        )
    if isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute):
        args = node.args
        if node.func.attr == "assertTrue" and args and isinstance(args[0], ast.Constant):
            return bool(args[0].value)
        if node.func.attr == "assertEqual" and len(args) >= 2:
            return _same_shape(args[0], args[1])
    return False


def _same_shape(one: ast.AST, other: ast.AST) -> bool:
    """``fingerprint(one) == fingerprint(other)``; nodes of different types never have the same one."""
    return type(one) is type(other) and fingerprint(one) == fingerprint(other)


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
