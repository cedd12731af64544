"""Where a check's reports go, shared by ``check`` and ``join``: the options, the plan, the writes.

- Without ``--output`` (or with ``--output -``) a machine format goes alone to stdout and the text view
  goes to stderr; only the text view alone goes to stdout. Two machine formats need a folder.
- With ``--output FILE`` (one format) or ``--output FOLDER`` (several) the files are written, and the
  text view goes to stdout.
- The files are truthful at every exit: the ones about to be written are removed before the check starts,
  and at the end each is written atomically (a temporary file renamed into place), with the verdict or,
  when the check stopped early (an error, an interrupt), with a report of the error.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import sys
import tempfile
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TextIO

from verifier.cli.choices import REPORT_FORMATS
from verifier.errors import ExitCode, UsageError, VerifierError

STDOUT = "-"


def add_output_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--format",
        action="append",
        choices=REPORT_FORMATS,
        metavar="FORMAT",
        help="output format: %(choices)s (repeatable; 'all' for every format)",
    )
    parser.add_argument(
        "--output", help="write the report here (a folder when several formats; '-' or nothing: stdout)"
    )
    parser.add_argument("--quiet", action="store_true", help="print only the verdict line and findings")
    parser.add_argument("--no-notes", action="store_true", help="do not record the verdict as git notes")
    parser.add_argument(
        "--notes-ref", help="the notes ref (default: git config verifier.notesRef, else refs/notes/verifier)"
    )


@dataclass(frozen=True)
class OutputPlan:
    """Which formats go where: ``files`` are written, ``to_stdout`` is the one format printed on stdout."""

    formats: tuple[str, ...]
    files: tuple[tuple[str, Path], ...]
    to_stdout: str | None
    quiet: bool

    @property
    def text_stream(self) -> TextIO:
        """Where the text view goes: stderr when a machine format has stdout."""
        return sys.stderr if self.to_stdout not in (None, "text") else sys.stdout

    def clear_stale(self) -> None:
        """Remove the files this check will write, so an old verdict is never left for CI to read."""
        for _fmt, target in self.files:
            try:
                target.unlink(missing_ok=True)
            except IsADirectoryError as error:
                raise UsageError(
                    f"--output {target} is a folder", hint="name a file, or give several formats"
                ) from error
            except OSError as error:
                raise UsageError(f"cannot replace the report {target}: {error.strerror}") from error

    def emit(self, report: Any) -> None:
        """Print and write ``report`` as planned."""
        from verifier.report import render
        from verifier.report.text import wants_colour

        if self.to_stdout != "text":
            stream = self.text_stream
            print(render(report, "text", colour=wants_colour(stream), quiet=self.quiet), end="", file=stream)
        if self.to_stdout is not None:
            options = {"colour": wants_colour(sys.stdout), "quiet": self.quiet} if self.to_stdout == "text" else {}
            sys.stdout.write(render(report, self.to_stdout, **options))
            sys.stdout.flush()
        for fmt, target in self.files:
            write_atomically(target, render(report, fmt))

    def emit_error(self, message: str, exit_code: int) -> None:
        """Write a report of the error into every planned file (never raises: the error is reported anyway)."""
        from verifier.report import format_module

        for fmt, target in self.files:
            render_error = getattr(format_module(fmt), "render_error", None)
            if render_error is None:
                continue
            with contextlib.suppress(OSError):
                write_atomically(target, render_error(message, int(exit_code)))
        if self.to_stdout not in (None, "text"):
            render_error = getattr(format_module(self.to_stdout), "render_error", None)
            if render_error is not None:
                sys.stdout.write(render_error(message, int(exit_code)))
                sys.stdout.flush()

    @contextlib.contextmanager
    def reporting_failures(self) -> Iterator[None]:
        """Run the check; if it stops with an error or an interrupt, write the error report, then let it go on."""
        try:
            yield
        except VerifierError as error:
            self.emit_error(str(error), error.exit_code)
            raise
        except KeyboardInterrupt:
            self.emit_error("interrupted; nothing was verified", ExitCode.INTERRUPTED)
            raise
        except Exception as error:
            self.emit_error(f"internal error: {type(error).__name__}: {error}", ExitCode.UNVERIFIED)
            raise


def plan_output(args: argparse.Namespace) -> OutputPlan:
    """The plan for the formats and ``--output`` of ``args``."""
    from verifier.report import FORMATS, for_machines, suffix

    chosen = args.format or ["text"]
    formats = tuple(FORMATS) if "all" in chosen else tuple(dict.fromkeys(chosen))
    output = args.output
    if output in (None, STDOUT):
        machine = [fmt for fmt in formats if for_machines(fmt)]
        if len(machine) > 1:
            raise UsageError(
                f"{', '.join(machine)} cannot share stdout",
                hint="write them into a folder with --output FOLDER",
            )
        return OutputPlan(formats, (), machine[0] if machine else "text", args.quiet)
    folder = Path(output)
    if len(formats) == 1:
        return OutputPlan(formats, ((formats[0], folder),), None, args.quiet)
    return OutputPlan(formats, tuple((fmt, folder / f"report.{suffix(fmt)}") for fmt in formats), None, args.quiet)


def write_atomically(target: Path, text: str) -> None:
    """Write ``text`` to ``target`` through a temporary file in the same folder, renamed into place."""
    target.parent.mkdir(parents=True, exist_ok=True)
    handle, temporary = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        with os.fdopen(handle, "w", encoding="utf-8") as out:
            out.write(text)
        os.chmod(temporary, 0o666 & ~_umask())  # as a plain write would make it (mkstemp makes it private)
        os.replace(temporary, target)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(temporary)
        raise


def _umask() -> int:
    current = os.umask(0o022)
    os.umask(current)
    return current


def record_notes(report: Any, args: argparse.Namespace) -> None:
    """One git note per checked commit (a --staged check has none yet: its post-commit hook writes it)."""
    if args.no_notes or getattr(args, "staged", False) or getattr(args, "part", None):  # a part has no verdict
        return
    from verifier.gitio import Git
    from verifier.report import notes

    git = Git(Git(args.repo).toplevel())
    warning = notes.try_write_notes(git, report, notes.configured_ref(git, args.notes_ref))
    if warning:
        print(f"verifier: {warning}", file=sys.stderr)
