"""``verifier sandbox doctor|build``: what works here, and the Docker image for this repository."""

from __future__ import annotations

import argparse
import sys

from verifier.errors import ExitCode

NAME = "sandbox"


def add_command(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    sandbox = commands.add_parser(NAME, help="sandbox tools")
    sandbox.add_argument(
        "action",
        choices=("doctor", "build"),
        help="doctor: what works here; build: the docker image for this repository",
    )
    sandbox.add_argument("--rev", default="HEAD", help="build: read the test dependencies at this revision")
    sandbox.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    if args.action == "build":
        from verifier.gitio import Git
        from verifier.sandbox.images import build_image

        git = Git(args.repo)
        tag = build_image(str(git.toplevel()), git.resolve(args.rev), lambda line: print(line, file=sys.stderr))
        print(tag)
        return ExitCode.PASS
    from verifier.sandbox.doctor import doctor

    return doctor()
