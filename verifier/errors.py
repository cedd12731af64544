"""Typed errors, each knowing where it happened; the CLI maps them to messages and exit codes in one place."""

from __future__ import annotations

from enum import IntEnum


class ExitCode(IntEnum):
    """How the ``verifier`` command ends; the hooks and CI read these numbers."""

    PASS = 0  # pass or warn
    BLOCK = 1  # a blocking finding
    USAGE = 2  # a bad command line or a broken policy
    UNVERIFIED = 3  # the gate could not verify (never a pass)
    PART_DONE = 4  # check --part K/N ran its share; no verdict of its own: verifier join gives it
    INTERRUPTED = 130  # stopped by Ctrl-C or SIGINT (128 + the signal number, as shells report it)


# The same values under their older names, for code that reads them as plain constants.
EXIT_PASS: int = ExitCode.PASS
EXIT_BLOCK: int = ExitCode.BLOCK
EXIT_USAGE: int = ExitCode.USAGE
EXIT_UNVERIFIED: int = ExitCode.UNVERIFIED


class VerifierError(Exception):
    """Base of every error the gate reports to a user; ``exit_code`` says how the CLI ends."""

    exit_code: ExitCode = ExitCode.USAGE

    def __init__(self, message: str, hint: str | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.hint = hint

    def __str__(self) -> str:
        return self.message if not self.hint else f"{self.message}\n  hint: {self.hint}"


class UsageError(VerifierError):
    """The command line asked for something that cannot be done (bad revision, missing file)."""


class GitError(VerifierError):
    """A git command failed; carries the command and git's own message."""

    def __init__(self, args: list[str], stderr: str, hint: str | None = None) -> None:
        super().__init__(f"git {' '.join(args)} failed: {stderr.strip() or 'no message'}", hint)
        self.git_args = args
        self.stderr = stderr


class PolicyError(VerifierError):
    """A policy file is broken; knows the file (or revision:file), line, column and key."""

    def __init__(self, source: str, line: int | None, key: str | None, problem: str, column: int | None = None) -> None:
        where = source if line is None else f"{source}:{line}"
        what = f"key '{key}': {problem}" if key else problem
        at_column = f" (column {column})" if column is not None and line is not None else ""
        super().__init__(f"{where}: {what}{at_column}")
        self.source = source
        self.line = line
        self.column = column
        self.key = key
        self.problem = problem


class CannotVerify(VerifierError):
    """The gate could not reach a verdict (no sandbox, timeout, crash); it never passes by default."""

    exit_code = ExitCode.UNVERIFIED


class SandboxUnavailable(CannotVerify):
    """No requested sandbox backend works here; ``tried`` lists each backend with the reason it failed."""

    def __init__(self, tried: list[tuple[str, str]], hint: str | None = None) -> None:
        lines = "; ".join(f"{name}: {reason}" for name, reason in tried)
        super().__init__(f"no sandbox could be started ({lines})", hint)
        self.tried = tried
