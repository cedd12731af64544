"""``verifier merge-reports``: join the JSON reports of ``check --shard K/N`` into one verdict."""

from __future__ import annotations

import argparse
from pathlib import Path

from verifier.cli.output import add_output_options, plan_output, record_notes

NAME = "merge-reports"


def add_command(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    merge = commands.add_parser(NAME, help="join the JSON reports of 'check --shard K/N' into one verdict")
    merge.add_argument("reports", nargs="+", type=Path, help="the JSON report of every shard")
    add_output_options(merge)
    merge.set_defaults(run=run, staged=False, shard=None)


def run(args: argparse.Namespace) -> int:
    from verifier.report.shards import merge_reports
    from verifier.verdict.decision import exit_code

    plan = plan_output(args)
    plan.clear_stale()
    with plan.reporting_failures():
        report = merge_reports(args.repo, args.reports)
        record_notes(report, args)
        plan.emit(report)
    return exit_code(report.verdict)
