"""``verifier rules [RULE]``: list the registered rules, or explain one."""

from __future__ import annotations

import argparse

from verifier.errors import ExitCode, UsageError

NAME = "rules"


def add_command(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    rules = commands.add_parser(NAME, help="list the rules, or explain one")
    rules.add_argument("rule", nargs="?", help="a rule id to explain")
    rules.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    return show_rules(args.rule)


def show_rules(rule_id: str | None) -> int:
    """Print every rule (``rule_id`` None) or the explanation of one."""
    from verifier.policy.view import render_explain, render_rules

    if rule_id is None:
        print(render_rules(), end="")
        return ExitCode.PASS
    text = render_explain(rule_id)
    if text is None:
        from verifier.rules.catalog import closest_rule_id

        close = closest_rule_id(rule_id)
        guess = f"; did you mean '{close}'?" if close else ""
        raise UsageError(f"unknown rule '{rule_id}'{guess}", hint="'verifier rules' lists them")
    print(text, end="")
    return ExitCode.PASS
