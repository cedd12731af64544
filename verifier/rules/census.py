"""``tests.lost``: tests of the base revision that the head run no longer runs (the test census).

The census (:mod:`verifier.testrun.census`) lists every base test the head run should have run again, with
its outcome at base. A test that ran at base and is skipped at head, whose module now skips itself, or that
is gone from the head run while its definition is still there (a class given ``__test__ = False`` or an
``__init__``, a decorator that returns no test, a file renamed outside pytest's collection pattern, a
parametrize list read from code the change shrank) no longer checks anything. A change to *code* can do
that to untouched tests (a flag a ``skipif`` reads, an import a module-level ``importorskip`` needs), which
no comparison of the test files shows. A test whose definition the change deleted is ``tests.weakened``'s.
"""

from __future__ import annotations

import ast
from collections.abc import Iterator, Mapping

from verifier.models import Finding, RunResult, TestOutcome
from verifier.pathglob import PYTEST_FILES, pytest_collects_file
from verifier.rules import RuleContext, rule
from verifier.rules.tests import _gist
from verifier.rules.weakened import TestModule, read_module

RULE_ID = "tests.lost"


@rule(
    RULE_ID,
    default="block",
    summary="a test that ran at base is skipped, uncollected or gone at head",
    stage="dynamic",
    sources=(
        "pytest documentation: How to use skip and xfail (module-level skips, importorskip)",
        "pytest documentation: Conventions for Python test discovery",
    ),
)
def lost_tests(context: RuleContext) -> Iterator[Finding]:
    """Every base test the head run should have run again must still run: a test that ran (passed or
    failed) at base and at head is skipped, sits in a module that now skips itself (a module-level
    ``pytest.importorskip`` or ``pytest.skip(..., allow_module_level=True)``, perhaps triggered by a code
    change), or is no longer collected while its definition is still there (``__test__ = False``, an
    ``__init__`` on its class, a decorator that returns no test, its file renamed outside ``test_*.py`` /
    ``*_test.py``) no longer checks anything. A test whose definition the change deleted is
    ``tests.weakened``'s business. Fix what makes it skip or vanish (often an import the change broke)."""
    run = context.run
    if run is None:
        return
    if run.census is None:
        if run.census_problem:
            yield Finding(RULE_ID, "error", f"cannot verify that no test was lost: {run.census_problem}")
        return
    head = {test.node_id: test for test in run.tests}
    for node_id, before in sorted(run.census.items()):
        if before != "skipped":
            yield from _judge(context, run, head, node_id, before)


def _judge(
    context: RuleContext, run: RunResult, head: Mapping[str, TestOutcome], node_id: str, before: str
) -> Iterator[Finding]:
    path, _, rest = node_id.partition("::")
    moved = _head_path(context, path)
    if moved is None:
        return  # the change deleted the file: tests.weakened judges the deletion
    head_path, source = moved
    now = head.get(f"{head_path}::{rest}")
    renamed_away = head_path != path and not pytest_collects_file(head_path)
    lost = _why_lost(run, now, head_path, source, rest, renamed_away)
    if lost is None:
        return
    message, details = lost
    yield Finding(
        RULE_ID,
        "block",
        f"{node_id} {before} at base, {message}",
        path=head_path,
        details={"base": before, "test": node_id, **details},
    )


def _why_lost(
    run: RunResult, now: TestOutcome | None, head_path: str, source: str | None, rest: str, renamed_away: bool
) -> tuple[str, dict[str, str]] | None:
    """What happened to a base test at head, or None when it still runs (or its definition was deleted)."""
    if renamed_away and _defined(source, rest) is not False:
        patterns = " ".join(PYTEST_FILES)
        return f"not collected at head: its file was renamed to {head_path} (pytest's python_files: {patterns})", {}
    if now is not None:
        if now.outcome != "skipped":
            return None
        return f"skipped at head: {_gist(now.message)}", {"message": now.message}
    skip = run.skipped_modules.get(head_path)
    if skip is not None:
        return f"skipped at head (its module skips itself): {skip}", {"message": skip}
    defined = _defined(source, rest)
    if defined is False:
        return None  # the change deleted the test function: tests.weakened judges the deletion
    reason = f": {defined}" if isinstance(defined, str) and defined else ""
    return f"not collected at head{reason}", {}


def _head_path(context: RuleContext, path: str) -> tuple[str, str | None] | None:
    """Where a base test file is at head and its head text (None: the change left it alone); None when the
    change deleted it."""
    for file in context.change.files:
        if file.old_path == path:
            if file.status == "deleted":
                return None
            return file.path, context.head_sources.get(file.path)
    return path, None


def _defined(source: str | None, rest: str) -> bool | str:
    """Whether the test a node id names is still defined in the head text: False when no function of its
    name is left (deleted), else why pytest would not collect it (a string, maybe empty), or True (the file
    is unchanged or unreadable: the definition is there as it was)."""
    if source is None:
        return True
    try:
        module: TestModule = read_module(ast.parse(source))
    except (SyntaxError, ValueError):
        return True
    qualname = ".".join(rest.split("[", 1)[0].split("::"))
    function = module.functions.get(qualname)
    if function is not None:
        return function.uncollected
    name = qualname.rsplit(".", 1)[-1]
    same_name = [f for q, f in module.functions.items() if q.rsplit(".", 1)[-1] == name]
    if not same_name or not same_name[0].uncollected:
        return False  # deleted, or moved to a test that is still collected (its new id runs at head)
    return f"now {same_name[0].qualname}, {same_name[0].uncollected}"


REWRITTEN_ID = "tests.rewritten"


@rule(
    REWRITTEN_ID,
    default="block",
    summary="a test's base version fails against the head code: its expectation was rewritten",
    stage="dynamic",
)
def rewritten_tests(context: RuleContext) -> Iterator[Finding]:
    """The base version of every existing test file a machine-written commit modifies is run against the
    head code. A test that passed at base and whose base version fails at head had its expectation
    rewritten to fit the change (a flipped assertion, an expected value changed, in whatever syntax): the
    old test says the behaviour changed. The finding names the test, the failure and the statements of the
    test that changed. Restore the expectation and fix the code; or, when the behaviour change is wanted, a
    human approves it with a waiver of this rule on the test file, with a reason."""
    run = context.run
    old = None if run is None else run.old_tests
    if run is None or old is None:
        return
    if old.status not in ("completed", "collection-error"):
        why = "; ".join(old.problems[:3]) or old.status
        yield Finding(REWRITTEN_ID, "error", f"cannot verify that the base tests still pass at head: {why}")
        return
    back = {f.path: f.old_path or f.path for f in context.change.files}
    census = run.census or {}
    for test in old.tests:
        if test.outcome in ("failed", "error"):
            yield from _rewritten(context, back, census, test.node_id, _gist(test.message))
    for error in old.collection_errors:
        path, _, message = error.partition(": ")
        base_path = back.get(path, path)
        hidden = [n for n, o in sorted(census.items()) if n.split("::", 1)[0] == base_path and o in PASSING]
        for base_id in hidden or [path]:
            yield from _rewritten(context, back, census, f"{path}::{base_id.partition('::')[2]}", message)


PASSING = ("passed", "flaky")


def _rewritten(
    context: RuleContext, back: Mapping[str, str], census: Mapping[str, str], node_id: str, failure: str
) -> Iterator[Finding]:
    path, _, rest = node_id.partition("::")
    base_path = back.get(path, path)
    at_base = census.get(f"{base_path}::{rest}") if rest else None
    if at_base is not None and at_base not in PASSING:
        return  # it failed (or skipped) at base too: not this change's doing
    changed = _changed_statements(context.base_sources.get(base_path), context.head_sources.get(path), rest)
    shown = f"; the test changed: {changed[0]} -> {changed[1]}" if changed else ""
    yield Finding(
        REWRITTEN_ID,
        "block",
        f"{node_id or path}: its base version fails against the head code ({failure}){shown}",
        path=path,
        line=None,
        details={"test": node_id, "failure": failure, **({"base": changed[0], "head": changed[1]} if changed else {})},
    )


def _changed_statements(base: str | None, head: str | None, rest: str) -> tuple[str, str] | None:
    """The first statement of the test's base version that its head version no longer has, and what the
    head version has instead (``(deleted)`` when the test is gone); assertions first."""
    before = _statements(base, rest)
    if before is None:
        return None
    now = _statements(head, rest) or []
    gone = [s for s in before if s not in now]
    fresh = [s for s in now if s not in before]
    if not gone:
        return None
    first_gone = next((s for s in gone if s.startswith(("assert", "self.assert"))), gone[0])
    first_fresh = next((s for s in fresh if s.startswith(("assert", "self.assert"))), fresh[0] if fresh else "")
    return f"`{first_gone}`", f"`{first_fresh}`" if first_fresh else "(removed)"


def _statements(source: str | None, rest: str) -> list[str] | None:
    """The simple statements of one test function, as source text; None when it is not there."""
    if source is None or not rest:
        return None
    try:
        tree = ast.parse(source)
    except (SyntaxError, ValueError):
        return None
    function = read_module(tree).functions.get(".".join(rest.split("[", 1)[0].split("::")))
    if function is None:
        return None
    compound = (ast.If, ast.For, ast.While, ast.With, ast.Try, ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)
    return [
        ast.unparse(node)
        for statement in function.node.body
        for node in ast.walk(statement)
        if isinstance(node, ast.stmt) and not isinstance(node, compound)
    ]
