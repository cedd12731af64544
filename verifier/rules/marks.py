"""Rules on the machine marks themselves: a mark that other tools read but the gate does not, and a scope
that takes a machine commit's every line out of the gate's view.

Both are ways to make machine-written work look human to the gate alone: a ``Model-Written`` line written
where ``git interpret-trailers`` does not look for trailers (the title, a middle paragraph, after a ``---``
line), which a reader or a simpler tool still takes as the mark; and a ``Model-Written-Scope`` that matches
none of the paths the commit changed.
"""

from __future__ import annotations

import re
from collections.abc import Iterator

from verifier.models import Finding
from verifier.provenance.trailers import MACHINE_KEY, SCOPE_KEY, machine_mark
from verifier.rules import RuleContext, rule

MISPLACED = "marks.misplaced"
SCOPE_MISS = "marks.scope-unmatched"
# a line that reads as the key followed by a separator, anywhere in the message
_KEY_LINE = re.compile(rf"(?im)^[ \t>]*({re.escape(MACHINE_KEY)}(?:-Scope)?)[ \t]*[:=]")
_SOURCES = ("git documentation: git interpret-trailers (where the trailer block is)", "docs/trailers.md")


@rule(
    MISPLACED,
    default="block",
    summary="a Model-Written line outside the commit's trailer block",
    stage="static",
    sources=_SOURCES,
)
def misplaced_marks(context: RuleContext) -> Iterator[Finding]:
    """A commit whose message has a ``Model-Written`` (or ``Model-Written-Scope``) line that is not in its
    trailer block, as ``git interpret-trailers --parse`` finds it (the last paragraph, before any ``---``
    line), looks machine-written to a reader and to simpler tools, but the gate would judge it as human.
    Whichever was meant, the gate cannot tell: move the line into the last paragraph of the message
    (``git commit --amend``, or ``git interpret-trailers``) or remove it."""
    for commit in context.change.commits:
        keys = {match.group(1).lower() for match in _KEY_LINE.finditer(commit.message)}
        if not keys or machine_mark(commit.message) is not None:
            continue
        shown = MACHINE_KEY if MACHINE_KEY.lower() in keys else SCOPE_KEY
        yield Finding(
            MISPLACED,
            "block",
            f"commit {commit.sha[:12]} has a {shown} line outside its trailer block: other tools read it as"
            " machine-written, the gate would not",
            details={"commit": commit.sha},
        )


@rule(
    SCOPE_MISS,
    default="block",
    summary="a Model-Written-Scope that matches none of the paths its commit changed",
    stage="static",
    sources=_SOURCES,
)
def unmatched_scopes(context: RuleContext) -> Iterator[Finding]:
    """A ``Model-Written-Scope`` says which of a machine commit's paths the model wrote. One that matches
    none of the paths the commit changed makes the whole commit human, silently: a typo, or a way around
    the gate. Fix the scope (``docs/trailers.md``) or drop it to mark the whole commit."""
    for sha, paths in context.provenance.scope_misses.items():
        mark = context.provenance.marks.get(sha)
        scope = " ".join(mark.scope) if mark is not None else "?"
        shown = ", ".join(paths[:5]) + (", ..." if len(paths) > 5 else "")
        yield Finding(
            SCOPE_MISS,
            "block",
            f"commit {sha[:12]}: its scope ({scope}) matches none of the paths it changed ({shown})",
            details={"commit": sha, "scope": list(mark.scope) if mark else [], "paths": list(paths)},
        )
