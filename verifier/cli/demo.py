"""``verifier demo [DIR]``: build the invented demo repository and run the gate on it."""

from __future__ import annotations

import argparse
from pathlib import Path

from verifier.cli.check import add_sandbox_option

NAME = "demo"


def add_command(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    demo = commands.add_parser(NAME, help="build a demo repository and run the gate on it")
    demo.add_argument("dir", nargs="?", type=Path, help="where to build it (default: a new temporary folder)")
    add_sandbox_option(demo)
    demo.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    from verifier.demo.scenario import run_demo

    return run_demo(args.dir, sandbox=args.sandbox)
