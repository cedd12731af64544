"""Names the command line gave up: each old option or subcommand ends with exit 2 and a message naming the
new spelling, so that a script written against an older release stops with directions instead of a
silent change of meaning or a bare "unrecognized arguments"."""

from __future__ import annotations

import argparse
from collections.abc import Sequence
from typing import Any

from verifier.errors import UsageError

# old subcommand -> (new subcommand, an example of its use)
RENAMED_COMMANDS = {"merge-reports": ("join", "verifier join part-1.json part-2.json")}


def renamed_option(parser: argparse.ArgumentParser, old: str, new: str, example: str) -> None:
    """Accept ``old`` (hidden from --help) only to refuse it with a message naming ``new``."""
    parser.add_argument(old, nargs="?", help=argparse.SUPPRESS, action=_Refuse, new=new, example=example)


class _Refuse(argparse.Action):
    def __init__(self, *args: Any, new: str, example: str, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.new = new
        self.example = example

    def __call__(
        self,
        parser: argparse.ArgumentParser,
        namespace: argparse.Namespace,
        values: str | Sequence[Any] | None,
        option_string: str | None = None,
    ) -> None:
        given = f"{option_string} {values}" if isinstance(values, str) else option_string
        raise UsageError(
            f"'{option_string}' was renamed '{self.new}'; use '{self.example}'", hint=f"you gave '{given}'"
        )


def refuse_renamed_command(argv: Sequence[str]) -> None:
    """Refuse an old subcommand name before parsing (argparse would only list the choices)."""
    command = _command_word(argv)
    if command in RENAMED_COMMANDS:
        new, example = RENAMED_COMMANDS[command]
        raise UsageError(f"the subcommand '{command}' was renamed '{new}'; use '{example}'")


def _command_word(argv: Sequence[str]) -> str | None:
    """The first word that is not an option of ``verifier`` itself (``-C DIR`` takes a value)."""
    words = iter(argv)
    for word in words:
        if word == "-C":
            next(words, None)
        elif not word.startswith("-"):
            return word
    return None
