"""The weekly audit, end to end: what the assistants committed in a window, what the gate verified, what
got through (``run_audit(repo, request) -> Audit``), and filling the gaps (:func:`recheck`).

Reading the modules in order follows the audit: :mod:`.window` (the dates), :mod:`.history` (the edge:
git, notes and the cache), :mod:`.patches` (the span's hunks), :mod:`.authorship` and :mod:`.replay`
(who wrote which line and how long it lived), :mod:`.compute` (plain data in, an :class:`Audit` out),
:mod:`.report` (one module per output format). :mod:`.model` holds the data they pass along.
"""

from __future__ import annotations

import contextlib
import gc
import os
from collections.abc import Iterator
from dataclasses import dataclass, replace
from typing import Any

from verifier.audit.compute import compute_audit
from verifier.audit.history import read_history, save_lines
from verifier.audit.model import DEFAULT_NOTES_REF, Audit, Settings
from verifier.audit.replay import line_facts
from verifier.audit.window import window_bounds
from verifier.errors import UsageError, VerifierError
from verifier.gitio import Git

__all__ = ["DEFAULT_NOTES_REF", "Audit", "AuditRequest", "no_cycle_collection", "recheck", "run_audit"]


@dataclass(frozen=True)
class AuditRequest:
    """What the command line asked for."""

    since: str | None = None
    until: str | None = None
    ref: str | None = None
    weeks: int = 4
    churn_days: int = 14
    expiry_days: int = 14
    agent_emails: tuple[str, ...] = ()
    notes_ref: str = DEFAULT_NOTES_REF
    use_cache: bool = True


def run_audit(repo: str | os.PathLike[str], request: AuditRequest, now: float | None = None) -> Audit:
    """Audit the repository at ``repo``."""
    if request.weeks < 0 or request.churn_days < 0 or request.expiry_days < 0:
        raise UsageError("--weeks, --churn-days and --expiry-days must not be negative")
    with no_cycle_collection():
        return _run_audit(repo, request, now)


@contextlib.contextmanager
def no_cycle_collection() -> Iterator[None]:
    """The audit makes tens of thousands of small objects and no reference cycles: the cycle collector,
    which runs after every few hundred allocations, would only walk them again and again."""
    enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if enabled:
            gc.enable()


def _run_audit(repo: str | os.PathLike[str], request: AuditRequest, now: float | None) -> Audit:
    git = Git(repo).located()
    since, until = window_bounds(request.since, request.until, now)
    history = read_history(
        git,
        request.ref,
        since,
        until,
        weeks=request.weeks,
        notes_ref=request.notes_ref,
        agent_emails=request.agent_emails,
        use_cache=request.use_cache,
    )
    if history.lines is None:
        lines = line_facts(history.commits, history.agent_emails, history.end)
        if request.use_cache:
            save_lines(git, history, lines)
        history = replace(history, lines=lines)
    audit = compute_audit(history, Settings(request.weeks, request.churn_days, request.expiry_days))
    return replace(audit, notes_ref=request.notes_ref)


def recheck(repo: str | os.PathLike[str], audit: Audit, sandbox: str = "auto", progress: Any = None) -> list[str]:
    """Run the gate on each unverified machine commit of ``audit`` and write its note; return the problems."""
    from verifier.change.stage import RevisionSpec
    from verifier.pipeline import Options, verify
    from verifier.report.notes import write_notes

    git = Git(repo).located()
    problems = []
    for row in audit.commits:
        if row.status != "unverified" or row.merge:
            continue
        if progress:
            progress(f"checking {row.sha[:12]} ({row.subject})")
        try:
            report = verify(os.fspath(repo), RevisionSpec(text=row.sha), Options(sandbox=sandbox))
        except VerifierError as error:
            problems.append(f"{row.sha[:12]}: {error.message}")
            continue
        write_notes(git, report, audit.notes_ref, how="audit-recheck")
    return problems
