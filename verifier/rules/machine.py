"""Helpers the static rules share: which lines and files a model changed, and a rule's options.

Added lines carry exact provenance (``Provenance.machine_lines``). Removed lines and whole-file events
(a file added, deleted or renamed) have no blame: in a change of one commit they belong to that commit;
in a range they count as machine-written when a machine commit of the range touched the path (within its
scope), which ``Provenance.machine_touched`` records. That still over-approximates when a human and a
model both edited the file in the range, which is the safe direction for a gate.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from verifier.models import FileChange
from verifier.pathglob import glob_matcher
from verifier.rules import REGISTRY, RuleContext

TEXT_STATUSES_WITH_FILE_EVENT = ("added", "deleted", "renamed", "copied", "type-changed")


def matches(path: str, globs: Sequence[str]) -> bool:
    return glob_matcher(tuple(globs))(path)


def option(context: RuleContext, rule_id: str, name: str) -> Any:
    """The policy's value of ``rule_id``'s option ``name``, else the rule's declared default."""
    return REGISTRY[rule_id].option(context.policy, name)


def machine_lines(context: RuleContext, path: str) -> frozenset[int]:
    """The head line numbers of ``path`` a model wrote."""
    return frozenset(context.provenance.machine_lines.get(path, ()))


def machine_may_have_touched(context: RuleContext, path: str) -> bool:
    """True when a machine-written commit of the change touched ``path`` (within its scope)."""
    return path in context.provenance.machine_touched


def machine_removed(context: RuleContext, file: FileChange) -> bool:
    """True when the file's removed lines (or its deletion, addition or rename) may be a model's work."""
    if not file.removed_lines and file.status not in TEXT_STATUSES_WITH_FILE_EVENT:
        return False
    paths = {file.path, file.old_path or file.path}
    return any(machine_may_have_touched(context, p) for p in paths)


def machine_changed(context: RuleContext, file: FileChange) -> bool:
    """True when a model wrote an added line of ``file`` or may have removed, added, deleted or renamed it."""
    return bool(machine_lines(context, file.path)) or machine_removed(context, file)


def base_text(context: RuleContext, file: FileChange) -> str | None:
    return context.base_sources.get(file.old_path) if file.old_path else None


def head_text(context: RuleContext, file: FileChange) -> str | None:
    return None if file.status == "deleted" else context.head_sources.get(file.path)


def mask(secret: str) -> str:
    """Enough of a secret to find it again, never enough to use it: ``AKIA…(20 chars)``."""
    shown = secret[:4] if len(secret) >= 12 else ""
    return f"{shown}…({len(secret)} chars)"
