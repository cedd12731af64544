"""Test-strength rules: machine-written tests that cannot fail on a wrong result (static, no execution).

A model writes the tests as well as the code, and its most common weak test runs the code without
checking it. Three rules, all on the test functions of the files ``tests.weakened`` treats as tests:

- ``tests.cannot-fail``: a new machine-written test with no check that can fail it;
- ``tests.dead-check``: a check on a machine-written line (or made dead by one) that cannot fail the test:
  fixed in the source, unreachable, under ``if False:``, in a nested function never called, swallowed;
- ``tests.swallowed-errors``: a ``try`` around the code under test whose ``except`` catches every
  exception and ignores it, so an error of the code cannot fail the test.

An existing test that loses checks is ``tests.weakened``'s business (compared with its base version);
these rules skip what that rule reports, so one fault gives one finding.
"""

from __future__ import annotations

import ast
from collections.abc import Iterator
from dataclasses import dataclass

from verifier.astnames import module_index, walk
from verifier.models import FileChange, Finding
from verifier.rules import RuleContext, rule
from verifier.rules.machine import base_text, glob_matcher, head_text, machine_lines, option
from verifier.rules.testbody import Check, catches_everything, check_reads, inert
from verifier.rules.weakened import RULE_ID as WEAKENED
from verifier.rules.weakened import TestFunction, TestModule, load, read_module

CANNOT_FAIL = "tests.cannot-fail"
DEAD_CHECK = "tests.dead-check"
SWALLOWED = "tests.swallowed-errors"
_SOURCES = (
    "pytest documentation: How to write and report assertions in tests (a test fails by an exception)",
    "pytest documentation: Conventions for Python test discovery",
    "Python docs: The assert statement; Built-in Exceptions, Exception hierarchy",
)


@dataclass(frozen=True)
class _TestUnderReview:
    """A test function with machine-written lines, and what it was at base (None: a new test)."""

    path: str
    module: TestModule
    function: TestFunction
    before: TestFunction | None
    machine: frozenset[int]

    @property
    def weakened_reports_it(self) -> bool:
        """``tests.weakened`` reports the lost checks of an existing test that has fewer of them."""
        return self.before is not None and len(self.function.asserts) < len(self.before.asserts)


_last: list[tuple[RuleContext, list[_TestUnderReview]]] = []  # the three rules read one change's tests once


def _machine_tests(context: RuleContext) -> list[_TestUnderReview]:
    if _last and _last[0][0] is context:
        return _last[0][1]
    is_test = glob_matcher(tuple(option(context, WEAKENED, "test_paths")))
    found: list[_TestUnderReview] = []
    for file in context.change.files:
        lines = machine_lines(context, file.path)
        if lines and file.path.endswith(".py") and is_test(file.path):
            found.extend(_tests_of_file(context, file, lines))
    _last[:] = [(context, found)]
    return found


def _tests_of_file(context: RuleContext, file: FileChange, lines: frozenset[int]) -> Iterator[_TestUnderReview]:
    source = head_text(context, file)
    index = module_index(source, file.path) if source is not None else None
    if index is None:
        return
    head = read_module(index.tree, index.names)
    base_source = base_text(context, file)
    base_index = module_index(base_source, file.old_path or file.path) if base_source else None
    base = read_module(base_index.tree, base_index.names) if base_index is not None else None
    for qualname, function in head.functions.items():
        if not any(n in lines for n in _span(function.node)):
            continue
        before = base.functions.get(qualname) if base is not None else None
        if before is not None and base is not None:
            load(before, base)
        yield _TestUnderReview(file.path, head, load(function, head), before, lines)


def _span(node: ast.FunctionDef | ast.AsyncFunctionDef) -> range:
    first = min([d.lineno for d in node.decorator_list] + [node.lineno])
    return range(first, (node.end_lineno or node.lineno) + 1)


@rule(
    CANNOT_FAIL,
    default="block",
    summary="a machine-written test that cannot fail on a wrong result",
    stage="static",
    sources=_SOURCES,
)
def tests_that_cannot_fail(context: RuleContext) -> Iterator[Finding]:
    """A new test a model wrote must be able to fail when the code is wrong. It needs at least one check
    that runs and can fail: an ``assert`` that is not fixed in the source, a raises-context
    (``pytest.raises``, ``self.assertRaises``), an assertion helper (``self.assert*``, a mock's
    ``assert_called*``, a helper of the same file that asserts), ``pytest.fail`` or a ``raise``. A test
    that only calls the code (or whose checks are all dead, see ``tests.dead-check``) shows the code ran,
    not that it is right. Add assertions on the results."""
    for test in _machine_tests(context):
        if test.before is not None:
            continue
        function = test.function
        if function.uncollected:
            yield _finding(CANNOT_FAIL, test, function.node.lineno, f"pytest never collects it: {function.uncollected}")
            continue
        if function.asserts:
            continue
        dead = [c for c in function.checks if not c.live]
        why = "it has no assertion" if not dead else "none of its checks can fail: " + _reasons(dead)
        yield _finding(CANNOT_FAIL, test, function.node.lineno, why, dead_lines=[c.line for c in dead])


@rule(
    DEAD_CHECK,
    default="block",
    summary="an assertion in a machine-written test that can never fail",
    stage="static",
    sources=_SOURCES,
)
def dead_checks(context: RuleContext) -> Iterator[Finding]:
    """A check that cannot fail the test is a check in appearance only. Reported on machine-written
    lines (or when a machine-written line makes it so): assertions on constants (``assert True``,
    ``assert 1``, ``assert "text"``, a non-empty tuple), a value compared with itself, two constants
    compared, ``x or True``; a check after an unconditional ``return``, ``raise``, ``continue``,
    ``break`` or ``pytest.fail``/``pytest.skip``; under ``if False:`` or ``while 0:``; inside a nested
    function or class the test never refers to; inside a ``try`` whose ``except`` catches
    ``AssertionError`` (or ``Exception``, or everything) and does nothing, or under
    ``contextlib.suppress`` of it. Make the check reachable and make it depend on the code's result."""
    for test in _machine_tests(context):
        function = test.function
        if test.weakened_reports_it or (test.before is None and not function.asserts):
            continue  # tests.weakened or tests.cannot-fail says it already
        old = _dead_shapes(test.before) if test.before is not None else set()
        for check in function.checks:
            if check.live or not (check.line in test.machine or check.cause in test.machine):
                continue
            if (check.status, ast.dump(check.node)) in old:
                continue  # dead at base already: not this change's doing
            message = f"the check on line {check.line} can never fail the test: {check.why}"
            yield _finding(DEAD_CHECK, test, check.line, message, status=check.status)


def _dead_shapes(function: TestFunction) -> set[tuple[str, str]]:
    return {(c.status, ast.dump(c.node)) for c in function.checks if not c.live}


@rule(
    SWALLOWED,
    default="block",
    summary="a machine-written test that ignores every exception of the code it calls",
    stage="static",
    sources=_SOURCES,
)
def swallowed_errors(context: RuleContext) -> Iterator[Finding]:
    """A ``try`` in a machine-written test whose ``except`` catches every exception (a bare ``except:``,
    ``except Exception``, ``except BaseException``) and does nothing about it (``pass``, ``...``, a
    constant, ``return``, ``continue``, printing or logging) hides every error of the code it calls: the
    test passes whether the code works or crashes. Reported when the ``try`` or its handler is on a
    machine-written line. Let the exception fail the test, expect a specific one with
    ``pytest.raises``, or turn it into ``pytest.fail``."""
    for test in _machine_tests(context):
        names = test.module.names
        reads = check_reads(test.function.node, names)
        for node in walk(test.function.node):
            if not isinstance(node, ast.Try) or not any(isinstance(n, ast.Call) for s in node.body for n in walk(s)):
                continue
            handler = next(
                (h for h in node.handlers if catches_everything(h, names) and inert(h.body, names, reads)), None
            )
            if handler is None or not (node.lineno in test.machine or handler.lineno in test.machine):
                continue
            if any(check.cause == handler.lineno for check in test.function.checks):
                continue  # the checks it swallows are reported as dead checks
            caught = ast.unparse(handler.type) if handler.type is not None else "everything"
            message = f"the try on line {node.lineno} ignores {caught} (line {handler.lineno}): errors cannot fail it"
            yield _finding(SWALLOWED, test, node.lineno, message)


def _reasons(checks: list[Check]) -> str:
    return "; ".join(f"line {c.line} {c.why}" for c in checks[:3]) + ("; ..." if len(checks) > 3 else "")


def _finding(rule_id: str, test: _TestUnderReview, line: int, why: str, **details: object) -> Finding:
    name = test.function.qualname
    return Finding(rule_id, "block", f"{name}: {why}", path=test.path, line=line, details={"test": name, **details})
