"""``patch.size``: a change with more machine-written lines than a reviewer can be expected to read."""

from __future__ import annotations

from collections.abc import Iterator

from verifier.models import Finding
from verifier.rules import RuleContext, rule
from verifier.rules.machine import matches, option
from verifier.words import counted

RULE_ID = "patch.size"


@rule(
    RULE_ID,
    default="advise",
    summary="more machine-written lines in one change than the policy allows",
    stage="static",
    options={"max_lines": 1000, "exclude": []},
    sources=("the gate's review model: a human reviews what the model wrote",),
)
def patch_size(context: RuleContext) -> Iterator[Finding]:
    """A change whose machine-written lines exceed the policy's ``max_lines`` (default 1000) is too big
    to review with care, whatever its tests say. Lines in paths matching option ``exclude`` (for example
    generated files) are not counted. Split the change into smaller ones, each reviewed and checked on
    its own."""
    limit = option(context, RULE_ID, "max_lines")
    excluded = option(context, RULE_ID, "exclude")
    counts = {
        path: len(lines) for path, lines in context.provenance.machine_lines.items() if not matches(path, excluded)
    }
    total = sum(counts.values())
    if total > limit:
        largest = sorted(counts.items(), key=lambda item: (-item[1], item[0]))[:5]
        yield Finding(
            RULE_ID,
            "warn",
            f"{counted(total, 'machine-written line')} in {counted(len(counts), 'file')}; "
            f"the policy allows {limit} per change",
            details={"lines": total, "limit": limit, "largest": dict(largest)},
        )
