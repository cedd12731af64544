"""``verifier check``: verify a change (``A..B``, one commit, or ``--staged``) and report the verdict.

The fast path: ``check --staged`` with a message that has no ``Model-Written`` trailer returns before
anything heavy is imported (the commit hook's common case).
"""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING

from verifier.cli.choices import SANDBOXES
from verifier.cli.output import add_output_options, plan_output, record_notes
from verifier.cli.renamed import renamed_option
from verifier.errors import ExitCode, UsageError

if TYPE_CHECKING:
    from verifier.models import Report

NAME = "check"


def add_command(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    check = commands.add_parser(NAME, help="verify a change: A..B, one commit, or --staged")
    check.add_argument("spec", nargs="?", help="A..B, a commit, or nothing (@{upstream}..HEAD, else HEAD)")
    check.add_argument("--staged", action="store_true", help="check the index against HEAD (a commit hook)")
    check.add_argument("--message-file", type=Path, help="with --staged: the pending commit message")
    add_sandbox_option(check)
    add_output_options(check)
    check.add_argument(
        "--deepen",
        type=int,
        metavar="N",
        help="in a shallow clone, fetch N more commits at a time (up to 10 times) until the change's base is present",
    )
    check.add_argument(
        "--all-tests", action="store_true", help="run every test, not only those that can observe the change"
    )
    check.add_argument(
        "--part",
        type=_part,
        metavar="K/N",
        help="run part K of N of the selected tests (one CI machine each; a part exits 4, having no verdict "
        "of its own); join the parts' JSON reports with 'verifier join' for the verdict",
    )
    renamed_option(check, "--shard", "--part", example="--part 1/2")
    add_org_policy_option(check)
    check.set_defaults(run=run)


def add_sandbox_option(parser: argparse.ArgumentParser, help_text: str = "where the tests run") -> None:
    parser.add_argument(
        "--sandbox", choices=SANDBOXES, default="auto", metavar="NAME", help=f"{help_text}: %(choices)s"
    )


def add_org_policy_option(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--org-policy",
        metavar="PATH",
        help="the organisation policy, layered under the repository's (default: $VERIFIER_ORG_POLICY)",
    )


def run(args: argparse.Namespace) -> int:
    message = _read_message(args)
    if args.staged and not _has_machine_trailer(message):
        if not args.quiet:  # on stderr when a machine format was asked for: stdout is that format's alone
            machine_on_stdout = args.output in (None, "-") and bool(set(args.format or ()) - {"text"})
            stream = sys.stderr if machine_on_stdout else sys.stdout
            print("verifier: no Model-Written trailer in the message; nothing to verify", file=stream)
        return ExitCode.PASS
    plan = plan_output(args)
    plan.clear_stale()
    with plan.reporting_failures():
        report = _verify(args)
        record_notes(report, args)
        plan.emit(report)
    from verifier.verdict.decision import exit_code

    return exit_code(report.verdict)


def _verify(args: argparse.Namespace) -> Report:
    from verifier.change.stage import RevisionSpec
    from verifier.pipeline import Options, verify
    from verifier.report.text import StageDisplay

    spec = RevisionSpec(text=args.spec, staged=args.staged, message=_read_message(args))
    index_file = (
        os.path.abspath(os.environ["GIT_INDEX_FILE"]) if args.staged and os.environ.get("GIT_INDEX_FILE") else None
    )
    with StageDisplay() as display:
        progress = None if args.quiet else display
        if args.deepen:
            _deepen(args, progress)
        options = Options(
            sandbox=args.sandbox,
            progress=progress,
            test_progress=display.tests if progress is not None and display.live else None,
            org_policy=args.org_policy,
            index_file=index_file,
            all_tests=args.all_tests,
            shard=args.part,
        )
        return verify(args.repo, spec, options)


def _part(text: str) -> tuple[int, int]:
    """``K/N`` -> (K, N), with 1 <= K <= N."""
    index, _, total = text.partition("/")
    if not (index.isdigit() and total.isdigit()) or not 1 <= int(index) <= int(total):
        raise argparse.ArgumentTypeError(f"'{text}' is not K/N with 1 <= K <= N (for example 2/4)")
    return int(index), int(total)


def _deepen(args: argparse.Namespace, progress: Callable[[str], None] | None) -> None:
    from verifier.gitio import Git
    from verifier.integration.ci import deepen_for

    deepen_for(Git(Git(args.repo).toplevel()), args.spec, args.deepen, say=progress or (lambda _text: None))


def _read_message(args: argparse.Namespace) -> str:
    if args.message_file is None:
        if args.staged:
            raise UsageError("--staged needs --message-file", hint="pass the pending message, as a commit-msg hook has")
        return ""
    if not args.staged:
        raise UsageError("--message-file goes with --staged")
    try:
        return args.message_file.read_text(encoding="utf-8", errors="replace")
    except OSError as error:
        raise UsageError(f"cannot read the message file {args.message_file}: {error.strerror}") from error


def _has_machine_trailer(message: str) -> bool:
    from verifier.provenance.trailers import machine_mark

    return machine_mark(message) is not None
