"""``tests.lost``: tests that ran at the base revision and no longer run at head (a census of the run).

A change to *code* can make untouched tests skip themselves: a module-level ``pytest.importorskip`` of a
module the change broke, a ``skipif`` on a flag the change flipped. Nothing in the tests changed, so
``tests.weakened`` sees nothing; only comparing the run at base with the run at head shows it. The
comparison needs the differential run (the policy's ``selection.differential: true``), which records each
selected test's outcome at base.
"""

from __future__ import annotations

from collections.abc import Iterator

from verifier.models import Finding
from verifier.rules import RuleContext, rule
from verifier.rules.tests import _gist

RULE_ID = "tests.lost"


@rule(
    RULE_ID,
    default="block",
    summary="a test that ran at base is skipped at head",
    stage="dynamic",
    sources=("pytest documentation: How to use skip and xfail (module-level skips, importorskip)",),
)
def lost_tests(context: RuleContext) -> Iterator[Finding]:
    """With a differential run, a test that ran (passed or failed) at base but is skipped at head, on its
    own or because its whole module now skips itself (a module-level ``pytest.importorskip`` or
    ``pytest.skip(..., allow_module_level=True)`` that a code change triggers), no longer checks anything:
    the change made it stop. A test deleted by the change is ``tests.weakened``'s business. Fix what makes it
    skip (usually an import the change broke)."""
    run = context.run
    if run is None or run.baseline is None:
        return
    head = {test.node_id: test for test in run.tests}
    skipped_files = {t.node_id: t for t in run.tests if t.outcome == "skipped" and "::" not in t.node_id}
    for node_id, before in sorted(run.baseline.items()):
        if before == "skipped":
            continue
        path = node_id.split("::", 1)[0]
        now = head.get(node_id) or skipped_files.get(path)
        if now is None or now.outcome != "skipped":
            continue
        whole = " (its module skips itself)" if now.node_id == path else ""
        yield Finding(
            RULE_ID,
            "block",
            f"{node_id} {before} at base, skipped at head{whole}: {_gist(now.message)}",
            path=path,
            details={"base": before, "message": now.message},
        )
