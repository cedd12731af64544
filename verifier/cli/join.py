"""``verifier join``: join the JSON reports of ``check --part K/N`` into one verdict."""

from __future__ import annotations

import argparse
from pathlib import Path

from verifier.cli.check import add_sandbox_option
from verifier.cli.output import add_output_options, plan_output, record_notes

NAME = "join"


def add_command(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    join = commands.add_parser(NAME, help="join the JSON reports of 'check --part K/N' into one verdict")
    join.add_argument("reports", nargs="+", type=Path, help="the JSON report of every part")
    add_sandbox_option(join, "where the join runs the test census and the old tests")
    add_output_options(join)
    join.set_defaults(run=run, staged=False, part=None)


def run(args: argparse.Namespace) -> int:
    from verifier.report.shards import join_reports
    from verifier.verdict.decision import exit_code

    plan = plan_output(args)
    plan.clear_stale()
    with plan.reporting_failures():
        report = join_reports(args.repo, args.reports, args.sandbox)
        record_notes(report, args)
        plan.emit(report)
    return exit_code(report.verdict)
