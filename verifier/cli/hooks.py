"""``verifier hooks install|uninstall|status`` and ``verifier hook NAME``, what an installed hook runs."""

from __future__ import annotations

import argparse
import sys

from verifier.errors import ExitCode
from verifier.integration.hooks import HOOK_NAMES


def add_command(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    hooks = commands.add_parser("hooks", help="install, uninstall or show the git hooks")
    hooks.add_argument("action", choices=("install", "uninstall", "status"))
    hooks.add_argument("--no-post-commit", action="store_true", help="install without the hook that writes notes")
    hooks.set_defaults(run=manage)
    hook = commands.add_parser("hook", help="what an installed git hook runs (used by the hook scripts)")
    hook.add_argument("name", choices=HOOK_NAMES)
    hook.add_argument("hook_args", nargs="*", metavar="ARG")
    hook.set_defaults(run=run_hook)


def manage(args: argparse.Namespace) -> int:
    from verifier.gitio import Git
    from verifier.integration import hooks

    git = Git(args.repo)
    git.toplevel()  # a clear message outside a repository
    if args.action == "status":
        print(f"hooks folder: {hooks.hooks_dir(git)}")
        for state in hooks.status(git):
            chained = " (runs the previous hook first)" if state.chained else ""
            print(f"  {state.name:<12} {state.state}{chained}")
        return ExitCode.PASS
    if args.action == "install":
        names = [n for n in hooks.HOOK_NAMES if not (args.no_post_commit and n == "post-commit")]
        lines = hooks.install(git, names)
    else:
        lines = hooks.uninstall(git)
    print(f"hooks folder: {hooks.hooks_dir(git)}")
    for line in lines:
        print(f"  {line}")
    return ExitCode.PASS


def run_hook(args: argparse.Namespace) -> int:
    from verifier.integration.hooks import run_hook as run_installed_hook

    return run_installed_hook(args.repo, args.name, args.hook_args, sys.stdin if args.name == "pre-push" else ())
