"""The command line: a thin argparse layer over :func:`verifier.pipeline.verify` and friends.

Each subcommand is one module of this package that owns its options (``add_command``) and its work
(the ``run`` it sets as the parser's default); :data:`COMMANDS` lists them. Errors are mapped to messages
and exit codes here, in one place (:class:`~verifier.errors.ExitCode`: 0 pass or warn, 1 block, 2 usage or
policy error or a renamed name, 3 could not verify, 4 a part's share done: ``join`` gives the verdict).
Imports are lazy: ``check --staged`` on a message without the ``Model-Written`` trailer (the commit hook's
common case) returns before anything heavy is imported.
"""

from __future__ import annotations

import argparse
import os
import signal
import sys
import threading
from collections.abc import Sequence
from types import FrameType

from verifier import __version__
from verifier.cli import audit, check, demo, hooks, join, policy, rules, sandbox
from verifier.cli.renamed import refuse_renamed_command
from verifier.errors import ExitCode, VerifierError

COMMANDS = (check, join, rules, policy, hooks, demo, sandbox, audit)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="verifier", description="A test-driven gate for machine-written patches.")
    parser.add_argument("--version", action="version", version=f"verifier {__version__}")
    parser.add_argument("-C", dest="repo", default=".", help="run as if started in this folder")
    commands = parser.add_subparsers(dest="command", required=True)
    for command in COMMANDS:
        command.add_command(commands)
    return parser


class Terminated(KeyboardInterrupt):
    """SIGTERM (a CI job cancelled): handled as an interrupt, so that the reports still say what happened."""


def _terminate(_signal: int, _frame: FrameType | None) -> None:
    raise Terminated()


def _handle_termination() -> None:
    """Turn SIGTERM into :class:`Terminated` when this is the main thread and nobody else handles it."""
    if threading.current_thread() is threading.main_thread() and signal.getsignal(signal.SIGTERM) is signal.SIG_DFL:
        signal.signal(signal.SIGTERM, _terminate)


def main(argv: Sequence[str] | None = None) -> int:
    try:
        refuse_renamed_command(sys.argv[1:] if argv is None else argv)
        args = build_parser().parse_args(argv)
        _handle_termination()
        return int(args.run(args))
    except VerifierError as error:
        print(f"verifier: {error}", file=sys.stderr)
        return int(error.exit_code)
    except KeyboardInterrupt:
        print("verifier: interrupted; nothing was verified", file=sys.stderr)
        return int(ExitCode.INTERRUPTED)
    except Exception as error:  # fail closed: an internal error is never a pass
        if os.environ.get("VERIFIER_DEBUG"):
            raise
        print(
            f"verifier: internal error: {type(error).__name__}: {error} (set VERIFIER_DEBUG=1 for the traceback)",
            file=sys.stderr,
        )
        return int(ExitCode.UNVERIFIED)


if __name__ == "__main__":  # pragma: no cover - python -m verifier.cli.main
    sys.exit(main())
