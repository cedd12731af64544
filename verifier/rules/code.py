"""Static rules on the machine-written code itself (no execution needed)."""

from __future__ import annotations

from collections.abc import Iterator

from verifier.astnames import syntax_error
from verifier.models import Finding
from verifier.rules import RuleContext, rule


@rule("code.syntax", default="block", summary="machine-written Python that does not parse", stage="static")
def syntax_errors(context: RuleContext) -> Iterator[Finding]:
    """A Python file with machine-written lines must parse. A syntax error is reported at its line, as a
    syntax error, rather than surfacing later as a confusing collection failure. Fix the code."""
    for path in context.provenance.machine_lines:
        source = context.head_sources.get(path)
        if source is None or not path.endswith(".py"):
            continue
        parsed = syntax_error(source, path)
        if isinstance(parsed, SyntaxError):
            yield Finding("code.syntax", "block", f"syntax error: {parsed.msg}", path=path, line=parsed.lineno)
        elif isinstance(parsed, ValueError):  # e.g. NUL bytes
            yield Finding("code.syntax", "block", f"cannot be parsed: {parsed}", path=path)
