"""``verifier audit``: the command line of the weekly audit (argparse only here; the work is imported lazily)."""

from __future__ import annotations

import argparse
import sys
from dataclasses import replace
from pathlib import Path
from typing import TYPE_CHECKING

from verifier.cli.check import add_sandbox_option
from verifier.cli.choices import AUDIT_FORMATS
from verifier.cli.output import write_atomically

if TYPE_CHECKING:
    from verifier.audit.build import Audit

NAME = "audit"


def add_command(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    audit = commands.add_parser("audit", help="machine-written commits of a window: verified, blocked, alive")
    audit.add_argument("--since", help="first day of the window, YYYY-MM-DD in UTC (default: 7 days before --until)")
    audit.add_argument("--until", help="last day of the window, YYYY-MM-DD in UTC, included (default: now)")
    audit.add_argument("--ref", help="the branch to audit (default: the current branch)")
    audit.add_argument("--weeks", type=int, default=4, help="trend weeks before the window (default 4)")
    audit.add_argument(
        "--churn-days", type=int, default=14, help="a machine line removed within this many days is churn (default 14)"
    )
    audit.add_argument(
        "--expiry-days",
        type=int,
        default=14,
        help="list waivers expiring within this many days after the window (default 14)",
    )
    audit.add_argument(
        "--agent-email",
        action="append",
        default=[],
        metavar="EMAIL",
        help="an assistant's email: its unmarked commits count as machine-written (repeatable)",
    )
    audit.add_argument(
        "--notes-ref",
        help="where the gate's notes are (default: git config verifier.notesRef, else refs/notes/verifier)",
    )
    audit.add_argument(
        "--recheck",
        action="store_true",
        help="run the gate on the unverified machine commits and write their notes first",
    )
    add_sandbox_option(audit, "with --recheck: where the tests run")
    audit.add_argument(
        "--format",
        action="append",
        choices=AUDIT_FORMATS,
        metavar="FORMAT",
        help="output format: %(choices)s (repeatable)",
    )
    audit.add_argument("--output", type=Path, help="write the report here (a folder when several formats)")
    audit.add_argument("--no-cache", action="store_true", help="read every patch again (the cache is in the git dir)")
    audit.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    from verifier.audit.build import AuditRequest, no_cycle_collection, recheck, run_audit
    from verifier.audit.report import FORMATS

    request = AuditRequest(
        since=args.since,
        until=args.until,
        ref=args.ref,
        weeks=args.weeks,
        churn_days=args.churn_days,
        expiry_days=args.expiry_days,
        agent_emails=tuple(args.agent_email),
        notes_ref=_notes_ref(args),
        use_cache=not args.no_cache,
    )
    audit = run_audit(args.repo, request)
    if args.recheck and audit.attention:
        say = lambda text: print(f"verifier: {text}", file=sys.stderr)  # noqa: E731
        problems = recheck(args.repo, audit, sandbox=args.sandbox, progress=say)
        audit = run_audit(args.repo, request)
        audit = replace(audit, problems=(*audit.problems, *(f"recheck: {p}" for p in problems)))
    chosen = args.format or ["markdown"]
    formats = list(FORMATS) if "all" in chosen else list(dict.fromkeys(chosen))
    with no_cycle_collection():  # a report is built of many small objects, none in a cycle
        _write_reports(audit, formats, args.output)
    return 0


def _write_reports(audit: Audit, formats: list[str], output: Path | None) -> None:
    from verifier.audit.report import SUFFIX, render

    texts = {fmt: render(audit, fmt) for fmt in formats}  # every format first: a failure leaves no partial set
    if output is None:
        for text in texts.values():
            print(text, end="")
        return
    targets = (
        [(formats[0], output)] if len(formats) == 1 else [(fmt, output / f"audit.{SUFFIX[fmt]}") for fmt in formats]
    )
    for fmt, target in targets:
        write_atomically(target, texts[fmt])
        print(f"verifier: wrote {target}", file=sys.stderr)


def _notes_ref(args: argparse.Namespace) -> str:
    from verifier.audit.build import DEFAULT_NOTES_REF

    try:
        from verifier.gitio import Git
        from verifier.report.notes import configured_ref
    except ImportError:
        return args.notes_ref or DEFAULT_NOTES_REF
    return configured_ref(Git(args.repo), args.notes_ref)
