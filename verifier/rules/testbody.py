"""What a test function really checks: each of its checks, and whether that check can ever fail the test.

A *check* is what makes a pytest test fail on a wrong result: an ``assert`` statement, a raises-context
(``pytest.raises``, ``self.assertRaises``, ...), an assertion helper (a call whose name begins with
``assert``, which covers unittest's ``self.assert*`` and the mock library's ``assert_called*``), an explicit
failure (``pytest.fail``, ``self.fail``, a ``raise`` statement), or a call of a helper function of the same
module that holds a live check itself.

Each check gets a status: ``live`` (it runs and can fail), or the reason it cannot fail the test:
``trivial`` (its outcome is fixed in the source: ``assert True``, ``x == x``, ``x or True``, a tuple),
``unreachable`` (after an unconditional ``return``, ``raise``, ``continue``, ``break`` or skip),
``dead-branch`` (under ``if False:``, ``while 0:``, the ``else`` of ``if True:``), ``uncalled`` (in a nested
function or class the test never refers to), or ``swallowed`` (inside a ``try`` whose handler catches
``AssertionError``, or under ``contextlib.suppress`` of it, and does nothing about it).

The analysis is syntactic and errs towards *live*: a loop body counts as run, any reference to a nested
function counts as a call. That keeps ordinary refactors of tests (helpers, loops, context managers) from
being reported; only shapes that cannot fail are.
"""

from __future__ import annotations

import ast
import functools
import weakref
from collections.abc import Iterable, Iterator
from dataclasses import dataclass

from verifier.astnames import Names, canonical, is_literal, resolve, walk

LIVE = "live"
State = tuple[str, str, int] | None  # None: live; else (status, why, the line that causes it)
RAISES_CALLS = frozenset(
    {
        "pytest.raises",
        "pytest.warns",
        "pytest.deprecated_call",
        "self.assertRaises",
        "self.assertRaisesRegex",
        "self.assertWarns",
        "self.assertWarnsRegex",
        "self.assertLogs",
    }
)
FAIL_CALLS = frozenset({"pytest.fail", "self.fail"})
# Calls that end the test where they stand (pytest documents skip, fail, xfail and exit as raising).
ENDING_CALLS = frozenset(
    {"pytest.skip", "pytest.xfail", "pytest.exit", "pytest.fail", "self.skipTest", "self.fail", "sys.exit", "os._exit"}
)
# Exceptions an ``except`` clause can name that catch a failed assert (AssertionError's bases, Python docs,
# Built-in Exceptions, "Exception hierarchy").
_CATCHES_ASSERTION = frozenset({"AssertionError", "Exception", "BaseException"})
_INERT_CALLS = ("print", "logging.", "logger.", "log.", "warnings.warn")


@dataclass(frozen=True)
class Check:
    """One check of a test function and whether it can fail the test (see the module's docstring)."""

    node: ast.AST
    line: int
    status: str  # LIVE, "trivial", "unreachable", "dead-branch", "uncalled", "swallowed"
    why: str = ""  # for a check that is not live: what makes it so, with the line that does
    cause: int = 0  # the line of what makes it so (the return, the if, the except, ...); 0 when live

    @property
    def live(self) -> bool:
        return self.status == LIVE


def called_names(node: ast.expr, names: Names) -> tuple[str, ...]:
    """The dotted names a call (or a decorator) refers to, ``builtins.`` dropped."""
    target = node.func if isinstance(node, ast.Call) else node
    return tuple(canonical(n) for n in resolve(target, names))


def is_raises_call(call: ast.Call, names: Names) -> bool:
    return any(n in RAISES_CALLS for n in called_names(call, names))


# Names that say a helper checks something (common practice in test suites: check_*, verify_*, expect_*).
_CHECKING_NAMES = ("assert", "check", "verify", "expect", "ensure")


def _is_assert_helper(call: ast.Call, names: Names, helpers: frozenset[str]) -> bool:
    """A call that can fail the test: an assertion helper by name, pytest's or unittest's failures and
    raises-contexts, a helper of this module that checks, or a helper imported from a test module (the
    gate cannot read it; a test suite's shared checks live there)."""
    if isinstance(call.func, ast.Attribute) and not _may_check(call.func, names):
        return False  # the quick answer for most method calls: no resolving needed
    for name in called_names(call, names):
        head, _, last = name.rpartition(".")
        if last.startswith(_CHECKING_NAMES) or name in FAIL_CALLS or name in RAISES_CALLS:
            return True
        if head == "<local>" and last in helpers:
            return True
        if head and not head.startswith(("<local>", "self", "?")) and _is_test_module(head):
            return True
    return False


_CHECKING_METHODS = frozenset(n.rsplit(".", 1)[-1] for n in FAIL_CALLS | RAISES_CALLS)


def _may_check(func: ast.Attribute, names: Names) -> bool:
    """Whether ``x.y.method(...)`` can be a check: by the method's name, or by a root that may name a test
    module (resolving the whole chain is left to the caller)."""
    if func.attr.startswith(_CHECKING_NAMES) or func.attr in _CHECKING_METHODS:
        return True
    root: ast.expr = func
    while isinstance(root, ast.Attribute):
        root = root.value
    if not isinstance(root, ast.Name):
        return False
    return any(_is_test_module(m) for m in names.aliases.get(root.id, ())) or (
        root.id not in names.aliases and _is_test_module(root.id)
    )


def _is_test_module(dotted: str) -> bool:
    return any(
        part.startswith("test") or part.endswith(("_test", "tests", "testing")) or part == "conftest"
        for part in dotted.split(".")
    )


def is_ending_call(node: ast.stmt, names: Names) -> bool:
    """``pytest.skip(...)``, ``pytest.fail(...)``, ``sys.exit()``, ... as a statement of its own."""
    return (
        isinstance(node, ast.Expr)
        and isinstance(node.value, ast.Call)
        and any(n in ENDING_CALLS for n in called_names(node.value, names))
    )


def trivial_reason(node: ast.AST) -> str | None:
    """Why the outcome of an ``assert`` (or ``assertTrue``/``assertEqual`` call) is fixed in the source, or None."""
    if isinstance(node, ast.Assert):
        return _always_true(node.test)
    if isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute) and node.args:
        method, args = node.func.attr, node.args
        if method in ("assertTrue", "assert_") and _always_true(args[0]):
            return _always_true(args[0])
        if method in ("assertEqual", "assertEquals") and len(args) >= 2 and _same(args[0], args[1]):
            return "compares a value with itself"
    return None


def _always_true(test: ast.expr) -> str | None:
    if isinstance(test, ast.Constant):
        return "asserts a constant" if test.value else None
    if isinstance(test, ast.Tuple) and test.elts:
        return "asserts a non-empty tuple, which is always true"
    if isinstance(test, ast.BoolOp) and isinstance(test.op, ast.Or) and any(_always_true(v) for v in test.values):
        return "is joined by 'or' to something always true"
    if isinstance(test, ast.UnaryOp) and isinstance(test.op, ast.Not) and isinstance(test.operand, ast.Constant):
        return "asserts a constant" if not test.operand.value else None
    if isinstance(test, ast.Compare) and len(test.ops) == 1:
        left, right = test.left, test.comparators[0]
        if isinstance(test.ops[0], (ast.Eq, ast.Is, ast.LtE, ast.GtE)) and _same(left, right):
            return "compares a value with itself"
        if is_literal(left) and is_literal(right):
            return "compares two constants"
    return None


def _same(one: ast.AST, other: ast.AST) -> bool:
    return type(one) is type(other) and ast.dump(one) == ast.dump(other)


# --- walking a test body --------------------------------------------------------------------------------


class _Walker:
    def __init__(self, function: ast.AST, names: Names, helpers: frozenset[str]) -> None:
        self.function = function
        self.names = names
        self.helpers = helpers
        self.found: list[Check] = []

    # read only when a nested definition or a try statement needs them (most tests have neither)
    @functools.cached_property
    def _names_read(self) -> tuple[frozenset[str], frozenset[str]]:
        return _reads_and_references(self.function, self.names)

    @property
    def reads(self) -> frozenset[str]:
        return self._names_read[0]

    @property
    def referenced(self) -> frozenset[str]:
        return self._names_read[1]

    def block(self, body: Iterable[ast.stmt], state: State) -> bool:
        """Walk ``body`` in ``state`` (None: live, else (status, why)); True when the block always ends early."""
        ends_at: ast.stmt | None = None
        for statement in body:
            if ends_at is not None and state is None:
                why = f"after the {_ending_word(ends_at)} on line {ends_at.lineno}"
                state = ("unreachable", why, ends_at.lineno)
            if self.statement(statement, state) and ends_at is None:
                ends_at = statement
        return ends_at is not None

    def statement(self, node: ast.stmt, state: State) -> bool:
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)):
            self.expressions(node.decorator_list, state)
            inner = state
            if state is None and node.name not in self.referenced:
                kind = "class" if isinstance(node, ast.ClassDef) else "function"
                why = f"in the nested {kind} {node.name} (line {node.lineno}), which is never called"
                inner = ("uncalled", why, node.lineno)
            self.block(node.body, inner)
            return False
        if isinstance(node, (ast.If, ast.While)):
            self.expressions([node.test], state)
            fixed = _constant_truth(node.test)
            keyword = "if" if isinstance(node, ast.If) else "while"
            body_state = state or (
                ("dead-branch", f"under '{keyword} {ast.unparse(node.test)}:' (line {node.lineno})", node.lineno)
                if fixed is False
                else None
            )
            else_state = state or (
                ("dead-branch", f"in the else of 'if {ast.unparse(node.test)}:' (line {node.lineno})", node.lineno)
                if fixed is True and isinstance(node, ast.If)
                else None
            )
            body_ends = self.block(node.body, body_state)
            else_ends = self.block(node.orelse, else_state)
            return isinstance(node, ast.If) and body_ends and else_ends and bool(node.orelse)
        if isinstance(node, ast.Try) or (hasattr(ast, "TryStar") and isinstance(node, ast.TryStar)):
            return self.try_statement(node, state)
        if isinstance(node, (ast.With, ast.AsyncWith)):
            return self.with_statement(node, state)
        if isinstance(node, (ast.For, ast.AsyncFor)):
            self.expressions([node.iter], state)
            self.block(node.body, state)
            self.block(node.orelse, state)
            return False
        if isinstance(node, ast.Match):
            self.expressions([node.subject], state)
            for case in node.cases:
                self.block(case.body, state)
            return False
        if isinstance(node, ast.Assert):
            reason = trivial_reason(node)
            self.add(node, state or (("trivial", reason, node.lineno) if reason else None))
            return False
        if isinstance(node, ast.Raise):
            self.add(node, state)
            return True
        self.expressions([node], state)
        return isinstance(node, (ast.Return, ast.Continue, ast.Break)) or is_ending_call(node, self.names)

    def try_statement(self, node: ast.Try, state: State) -> bool:
        swallowing = next((h for h in node.handlers if _swallows(h, self.names, self.reads)), None)
        body_state = state or (
            (
                "swallowed",
                f"inside the try whose 'except' on line {swallowing.lineno} ignores a failed assert",
                swallowing.lineno,
            )
            if swallowing is not None
            else None
        )
        self.block(node.body, body_state)
        for handler in node.handlers:
            self.block(handler.body, state)
        self.block(node.orelse, state)  # the else runs outside the handlers' reach
        return self.block(node.finalbody, state)

    def with_statement(self, node: ast.With | ast.AsyncWith, state: State) -> bool:
        suppressing = None
        for item in node.items:
            expr = item.context_expr
            if isinstance(expr, ast.Call):
                called = called_names(expr, self.names)
                if is_raises_call(expr, self.names):
                    self.add(expr, state)
                    self.expressions(expr.args + [k.value for k in expr.keywords], state, skip=expr)
                    continue
                if "contextlib.suppress" in called and any(_catches_assertion(a, self.names) for a in expr.args):
                    suppressing = expr
            self.expressions([expr], state)
        body_state = state or (
            ("swallowed", f"under contextlib.suppress on line {suppressing.lineno}", suppressing.lineno)
            if suppressing
            else None
        )
        return self.block(node.body, body_state)

    def expressions(self, nodes: Iterable[ast.AST], state: State, skip: ast.AST | None = None) -> None:
        for root in nodes:
            for node in walk(root):
                if node is skip or not isinstance(node, ast.Call):
                    continue
                if _is_assert_helper(node, self.names, self.helpers):
                    reason = trivial_reason(node)
                    self.add(node, state or (("trivial", reason, node.lineno) if reason else None))

    def add(self, node: ast.AST, state: State) -> None:
        status, why, cause = state or (LIVE, "", 0)
        self.found.append(Check(node, getattr(node, "lineno", 0), status, why, cause))


def _ending_word(node: ast.stmt) -> str:
    if isinstance(node, ast.Return):
        return "return"
    if isinstance(node, ast.Raise):
        return "raise"
    if isinstance(node, (ast.Continue, ast.Break)):
        return type(node).__name__.lower()
    if isinstance(node, ast.If):
        return "if whose branches all end the test"
    return "call that ends the test"


def _constant_truth(test: ast.expr) -> bool | None:
    if isinstance(test, ast.Constant):
        return bool(test.value)
    if isinstance(test, ast.UnaryOp) and isinstance(test.op, ast.Not) and isinstance(test.operand, ast.Constant):
        return not test.operand.value
    return None


def _catches_assertion(node: ast.expr | None, names: Names) -> bool:
    if node is None:
        return True  # a bare ``except:``
    items = node.elts if isinstance(node, ast.Tuple) else [node]
    return any(canonical(n) in _CATCHES_ASSERTION for item in items for n in resolve(item, names))


def catches_everything(handler: ast.ExceptHandler, names: Names) -> bool:
    """A bare ``except:``, or one naming ``Exception`` or ``BaseException``."""
    if handler.type is None:
        return True
    items = handler.type.elts if isinstance(handler.type, ast.Tuple) else [handler.type]
    return any(canonical(n) in ("Exception", "BaseException") for item in items for n in resolve(item, names))


def inert(body: list[ast.stmt], names: Names, check_reads: frozenset[str] = frozenset()) -> bool:
    """A handler body that does nothing about the exception: ``pass``, ``...``, a constant, ``continue``,
    ``break``, a bare or constant ``return``, printing or logging, a constant assigned to a name no check
    reads (or then a return). Anything else (a re-raise, a failure, a flag a later check reads) handles it."""
    leaves = bool(body) and isinstance(body[-1], (ast.Return, ast.Continue, ast.Break))
    for statement in body:
        if isinstance(statement, (ast.Pass, ast.Continue, ast.Break)):
            continue
        if isinstance(statement, ast.Return) and (statement.value is None or isinstance(statement.value, ast.Constant)):
            continue
        if isinstance(statement, ast.Assign) and isinstance(statement.value, ast.Constant):
            targets = {t.id for t in statement.targets if isinstance(t, ast.Name)}
            if len(targets) == len(statement.targets) and (leaves or not targets & check_reads):
                continue
        if isinstance(statement, ast.Expr):
            value = statement.value
            if isinstance(value, ast.Constant):
                continue
            if isinstance(value, ast.Call) and any(n.startswith(_INERT_CALLS) for n in called_names(value, names)):
                continue
        return False
    return True


def check_reads(function: ast.AST, names: Names) -> frozenset[str]:
    """The names the function's assertions (and assertion-helper calls) read."""
    return _reads_and_references(function, names)[0]


def _reads_and_references(function: ast.AST, names: Names) -> tuple[frozenset[str], frozenset[str]]:
    """(the names the checks read, every name the function loads), in one walk."""
    reads: set[str] = set()
    loaded: set[str] = set()
    for node in walk(function):
        if isinstance(node, ast.Name):
            if isinstance(node.ctx, ast.Load):
                loaded.add(node.id)
        elif isinstance(node, ast.Assert) or (
            isinstance(node, ast.Call) and _is_assert_helper(node, names, frozenset())
        ):
            reads.update(n.id for n in walk(node) if isinstance(n, ast.Name))
    return frozenset(reads), frozenset(loaded)


def _swallows(handler: ast.ExceptHandler, names: Names, reads: frozenset[str]) -> bool:
    return _catches_assertion(handler.type, names) and inert(handler.body, names, reads)


_memo: weakref.WeakKeyDictionary[ast.AST, tuple[frozenset[str], list[Check]]] = weakref.WeakKeyDictionary()


def checks_of(
    function: ast.FunctionDef | ast.AsyncFunctionDef, names: Names, helpers: frozenset[str] = frozenset()
) -> list[Check]:
    """Every check of ``function`` with its status, in source order (kept while the tree lives: the parse
    is shared by the rules, and several read the same tests)."""
    kept = _memo.get(function)
    if kept is not None and kept[0] == helpers:
        return kept[1]
    walker = _Walker(function, names, helpers)
    walker.block(function.body, None)
    walker.found.sort(key=lambda c: (c.line, getattr(c.node, "col_offset", 0)))
    _memo[function] = (helpers, walker.found)
    return walker.found


def assertion_helpers(tree: ast.Module, names: Names) -> frozenset[str]:
    """Module-level functions (not tests) that hold a live check, directly or through another such helper:
    calling one is a check. Found by iterating to a fixed point."""
    candidates = {
        node.name: node
        for node in tree.body
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)) and not node.name.startswith("test")
    }
    helpers: set[str] = set()
    changed = True
    while changed:
        changed = False
        for name, node in candidates.items():
            if name not in helpers and any(c.live for c in checks_of(node, names, frozenset(helpers))):
                helpers.add(name)
                changed = True
    return frozenset(helpers)


def live_checks(checks: Iterable[Check]) -> Iterator[Check]:
    return (c for c in checks if c.live)
