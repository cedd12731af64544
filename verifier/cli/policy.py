"""``verifier policy check|show|explain|rules``: validate, show and explain the policy."""

from __future__ import annotations

import argparse
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING

from verifier.cli.check import add_org_policy_option
from verifier.cli.rules import show_rules
from verifier.errors import ExitCode, UsageError
from verifier.words import counted

if TYPE_CHECKING:
    from verifier.models import Policy
    from verifier.policy.parse import Layer

NAME = "policy"


def add_command(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    policy = commands.add_parser(NAME, help="check, show and explain the policy")
    actions = policy.add_subparsers(dest="action", required=True)
    policy_check = actions.add_parser("check", help="validate a policy file (default: verifier.yaml)")
    policy_check.add_argument("file", nargs="?", type=Path, default=None)
    policy_check.set_defaults(run=check_file)
    policy_show = actions.add_parser("show", help="the effective policy at HEAD, each value with its origin")
    policy_show.add_argument("--format", choices=("text", "json"), default="text")
    policy_show.set_defaults(run=show)
    for action in (policy_check, policy_show):
        add_org_policy_option(action)
    explain = actions.add_parser("explain", help="what a rule catches, why, how to fix it")
    explain.add_argument("rule")
    explain.set_defaults(run=lambda args: show_rules(args.rule))
    actions.add_parser("rules", help="list the rules (as 'verifier rules')").set_defaults(
        run=lambda _args: show_rules(None)
    )


def check_file(args: argparse.Namespace) -> int:
    """Validate a policy file on disk with the layers below it."""
    from verifier.gitio import Git
    from verifier.policy.loader import POLICY_FILE, build_policy, file_layers

    root = Path(args.repo)
    if Git(root).ok(["rev-parse", "--show-toplevel"]):
        root = Git(root).toplevel()
    target = args.file if args.file is not None else root / POLICY_FILE
    if not target.is_file():
        raise UsageError(f"no policy file {target}", hint="name one: verifier policy check FILE")
    layers = file_layers(target, root, args.org_policy)
    policy = build_policy(layers)
    print(
        f"{target}: valid (coverage threshold {policy.coverage_threshold:g}%, "
        f"wall limit {policy.limits.wall_seconds:g}s, {counted(len(policy.overrides), 'path setting')}, "
        f"{counted(len(policy.waivers), 'waiver')})"
    )
    print(_notices(layers, policy), end="")
    return ExitCode.PASS


def _notices(layers: list[Layer], policy: Policy) -> str:
    """The notices of a valid policy, one a line: lists that replace a default, waivers past or near their date."""
    from verifier.policy.notices import replaced_lists
    from verifier.verdict.waivers import waiver_notes

    lines = [f"notice: {replaced.message}" for replaced in replaced_lists(layers)]
    lines += [f"warning: {note}" for note in waiver_notes(policy, datetime.now(timezone.utc).date())]
    return "".join(f"{line}\n" for line in lines)


def show(args: argparse.Namespace) -> int:
    """The policy a change on top of the current HEAD would be judged by (HEAD is its base)."""
    from verifier.gitio import Git
    from verifier.policy.loader import build_policy, policy_layers
    from verifier.policy.view import render_show, render_show_json
    from verifier.verdict.waivers import waiver_notes

    git = Git(Git(args.repo).toplevel())
    base = git.resolve("HEAD") if git.has_commits() else None
    layers = policy_layers(git, base, args.org_policy)
    policy = build_policy(layers)  # the same checks as a real run
    if args.format == "json":
        print(render_show_json(layers, waiver_notes(policy, datetime.now(timezone.utc).date())), end="")
    else:
        print(render_show(layers) + _notices(layers, policy), end="")
    return ExitCode.PASS
