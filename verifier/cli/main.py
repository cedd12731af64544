"""The command line: a thin argparse layer over :func:`verifier.pipeline.verify` and friends.

Errors are mapped to messages and exit codes here, in one place: 0 pass or warn, 1 block, 2 usage or
policy error, 3 could not verify. Imports are lazy: ``check --staged`` on a message without the
``Model-Written`` trailer (the commit hook's common case) returns before anything heavy is imported.
"""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Sequence
from pathlib import Path

from verifier.errors import EXIT_UNVERIFIED, UsageError, VerifierError

SANDBOX_CHOICES = ("auto", "docker", "namespace", "process")
FORMAT_SUFFIX = {"text": "txt", "json": "json", "sarif": "sarif", "markdown": "md", "junit": "junit.xml"}
HOOK_CHOICES = ("commit-msg", "pre-push", "post-commit")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="verifier", description="A test-driven gate for machine-written patches.")
    parser.add_argument("-C", dest="repo", default=".", help="run as if started in this folder")
    commands = parser.add_subparsers(dest="command", required=True)

    check = commands.add_parser("check", help="verify a change: A..B, one commit, or --staged")
    check.add_argument("spec", nargs="?", help="A..B, a commit, or nothing (@{upstream}..HEAD, else HEAD)")
    check.add_argument("--staged", action="store_true", help="check the index against HEAD (a commit hook)")
    check.add_argument("--message-file", type=Path, help="with --staged: the pending commit message")
    check.add_argument("--sandbox", choices=SANDBOX_CHOICES, default="auto", help="where the tests run")
    check.add_argument(
        "--format",
        action="append",
        choices=(*FORMAT_SUFFIX, "all"),
        help="output format (repeatable; 'all' for every format)",
    )
    check.add_argument("--output", type=Path, help="write the report here (a folder when several formats)")
    check.add_argument("--quiet", action="store_true", help="print only the verdict line and findings")
    check.add_argument("--no-notes", action="store_true", help="do not record the verdict as git notes")
    check.add_argument(
        "--notes-ref", help="the notes ref (default: git config verifier.notesRef, else refs/notes/verifier)"
    )
    check.add_argument(
        "--deepen",
        type=int,
        metavar="N",
        help="in a shallow clone, fetch N more commits at a time (up to 10 times) until the change's base is present",
    )
    check.add_argument(
        "--all-tests", action="store_true", help="run every test, not only those that can observe the change"
    )
    check.add_argument(
        "--shard",
        type=_shard,
        metavar="K/N",
        help="run shard K of N of the selected tests (one "
        "CI machine each); join the JSON reports with 'verifier merge-reports'",
    )
    _add_org_policy(check)

    merge = commands.add_parser("merge-reports", help="join the JSON reports of 'check --shard K/N' into one verdict")
    merge.add_argument("reports", nargs="+", type=Path, help="the JSON report of every shard")
    merge.add_argument("--format", action="append", choices=(*FORMAT_SUFFIX, "all"), help="output format")
    merge.add_argument("--output", type=Path, help="write the report here (a folder when several formats)")
    merge.add_argument("--quiet", action="store_true", help="print only the verdict line and findings")
    merge.add_argument("--no-notes", action="store_true", help="do not record the verdict as git notes")
    merge.add_argument("--notes-ref", help="the notes ref (as for check)")
    merge.set_defaults(staged=False, shard=None)

    rules = commands.add_parser("rules", help="list the rules, or explain one")
    rules.add_argument("rule", nargs="?", help="a rule id to explain")

    policy = commands.add_parser("policy", help="check, show and explain the policy")
    actions = policy.add_subparsers(dest="action", required=True)
    policy_check = actions.add_parser("check", help="validate a policy file (default: verifier.yaml)")
    policy_check.add_argument("file", nargs="?", type=Path, default=None)
    policy_show = actions.add_parser("show", help="the effective policy at HEAD, each value with its origin")
    policy_show.add_argument("--format", choices=("text", "json"), default="text")
    for action in (policy_check, policy_show):
        _add_org_policy(action)
    actions.add_parser("explain", help="what a rule catches, why, how to fix it").add_argument("rule")
    actions.add_parser("rules", help="list the rules (as 'verifier rules')")

    hooks = commands.add_parser("hooks", help="install, uninstall or show the git hooks")
    hooks.add_argument("action", choices=("install", "uninstall", "status"))
    hooks.add_argument("--no-post-commit", action="store_true", help="install without the hook that writes notes")
    hook = commands.add_parser("hook", help="what an installed git hook runs (used by the hook scripts)")
    hook.add_argument("name", choices=HOOK_CHOICES)
    hook.add_argument("hook_args", nargs="*", metavar="ARG")

    demo = commands.add_parser("demo", help="build a demo repository and run the gate on it")
    demo.add_argument("dir", nargs="?", type=Path, help="where to build it (default: a new temporary folder)")
    demo.add_argument("--sandbox", choices=SANDBOX_CHOICES, default="auto")

    sandbox = commands.add_parser("sandbox", help="sandbox tools")
    sandbox.add_argument(
        "action",
        choices=("doctor", "build"),
        help="doctor: what works here; build: the docker image for this repository",
    )
    sandbox.add_argument("--rev", default="HEAD", help="build: read the test dependencies at this revision")

    from verifier.cli.audit import add_audit_command

    add_audit_command(commands)
    return parser


def _add_org_policy(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--org-policy",
        metavar="PATH",
        help="the organisation policy, layered under the repository's (default: $VERIFIER_ORG_POLICY)",
    )


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        return _dispatch(args)
    except VerifierError as error:
        print(f"verifier: {error}", file=sys.stderr)
        _write_error_report(args, str(error), error.exit_code)
        return error.exit_code
    except KeyboardInterrupt:
        print("verifier: interrupted; nothing was verified", file=sys.stderr)
        return 130
    except Exception as error:  # fail closed: an internal error is never a pass
        if os.environ.get("VERIFIER_DEBUG"):
            raise
        print(
            f"verifier: internal error: {type(error).__name__}: {error} (set VERIFIER_DEBUG=1 for the traceback)",
            file=sys.stderr,
        )
        return EXIT_UNVERIFIED


def _dispatch(args: argparse.Namespace) -> int:
    handlers = {
        "check": _check,
        "rules": _rules,
        "policy": _policy,
        "demo": _demo,
        "sandbox": _sandbox,
        "hooks": _hooks,
        "hook": _hook,
        "audit": _audit,
        "merge-reports": _merge_reports,
    }
    return handlers[args.command](args)


def _check(args: argparse.Namespace) -> int:
    message = _read_message(args)
    if args.staged and not _has_machine_trailer(message):
        if not args.quiet:
            print("verifier: no Model-Written trailer in the message; nothing to verify")
        return 0
    from verifier.change.stage import RevisionSpec
    from verifier.pipeline import Options, verify
    from verifier.report.text import StageDisplay
    from verifier.verdict.decision import EXIT_CODES

    spec = RevisionSpec(text=args.spec, staged=args.staged, message=message)
    index_file = (
        os.path.abspath(os.environ["GIT_INDEX_FILE"]) if args.staged and os.environ.get("GIT_INDEX_FILE") else None
    )
    with StageDisplay() as display:
        progress = None if args.quiet else display
        if args.deepen:
            _deepen(args, progress)
        options = Options(
            sandbox=args.sandbox,
            progress=progress,
            org_policy=args.org_policy,
            index_file=index_file,
            all_tests=args.all_tests,
            shard=args.shard,
        )
        report = verify(args.repo, spec, options)
    _record_notes(report, args)
    _emit(report, args)
    return EXIT_CODES[report.verdict]


def _merge_reports(args: argparse.Namespace) -> int:
    from verifier.report.shards import merge_reports
    from verifier.verdict.decision import EXIT_CODES

    report = merge_reports(args.repo, args.reports)
    _record_notes(report, args)
    _emit(report, args)
    return EXIT_CODES[report.verdict]


def _shard(text: str) -> tuple[int, int]:
    """``K/N`` -> (K, N), with 1 <= K <= N."""
    index, _, total = text.partition("/")
    if not (index.isdigit() and total.isdigit()) or not 1 <= int(index) <= int(total):
        raise argparse.ArgumentTypeError(f"'{text}' is not K/N with 1 <= K <= N (for example 2/4)")
    return int(index), int(total)


def _deepen(args: argparse.Namespace, progress) -> None:  # type: ignore[no-untyped-def]
    from verifier.gitio import Git
    from verifier.integration.ci import deepen_for

    deepen_for(Git(Git(args.repo).toplevel()), args.spec, args.deepen, say=progress or (lambda _text: None))


def _record_notes(report, args: argparse.Namespace) -> None:  # type: ignore[no-untyped-def]
    """One git note per checked commit (a --staged check has none yet: its post-commit hook writes it)."""
    if args.no_notes or args.staged or getattr(args, "shard", None):  # a shard's verdict is partial
        return
    from verifier.gitio import Git
    from verifier.report import notes

    git = Git(Git(args.repo).toplevel())
    warning = notes.try_write_notes(git, report, notes.configured_ref(git, args.notes_ref))
    if warning:
        print(f"verifier: {warning}", file=sys.stderr)


def _read_message(args: argparse.Namespace) -> str:
    if args.message_file is None:
        if args.staged:
            raise UsageError("--staged needs --message-file", hint="pass the pending message, as a commit-msg hook has")
        return ""
    if not args.staged:
        raise UsageError("--message-file goes with --staged")
    try:
        return args.message_file.read_text(encoding="utf-8", errors="replace")
    except OSError as error:
        raise UsageError(f"cannot read the message file {args.message_file}: {error.strerror}") from error


def _has_machine_trailer(message: str) -> bool:
    from verifier.provenance.trailers import machine_mark

    return machine_mark(message) is not None


def _emit(report, args: argparse.Namespace) -> None:  # type: ignore[no-untyped-def]
    from verifier.report import render
    from verifier.report.text import wants_colour

    formats = _formats(args)
    print(render(report, "text", colour=wants_colour(sys.stdout), quiet=args.quiet), end="")
    if args.output is None:
        if formats != ["text"]:
            for fmt in formats:
                if fmt != "text":
                    print(render(report, fmt), end="")
        return
    for fmt, target in _targets(args.output, formats):
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_text(render(report, fmt), encoding="utf-8")


def _formats(args: argparse.Namespace) -> list[str]:
    chosen = args.format or ["text"]
    return list(FORMAT_SUFFIX) if "all" in chosen else list(dict.fromkeys(chosen))


def _targets(output: Path, formats: list[str]) -> list[tuple[str, Path]]:
    if len(formats) == 1:
        return [(formats[0], output)]
    return [(fmt, output / f"report.{FORMAT_SUFFIX[fmt]}") for fmt in formats]


def _write_error_report(args: argparse.Namespace, message: str, exit_code: int) -> None:
    """Even when the gate stops early, a CI step reading the JSON report finds the reason there."""
    if getattr(args, "command", None) != "check" or args.output is None or "json" not in _formats(args):
        return
    import json

    from verifier.report.jsonfmt import error_dict

    target = dict(_targets(args.output, _formats(args)))["json"]
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_text(json.dumps(error_dict(message, exit_code), indent=2) + "\n", encoding="utf-8")
    except OSError:
        pass


def _rules(args: argparse.Namespace) -> int:
    from verifier.policy.view import render_explain, render_rules

    if args.rule is None:
        print(render_rules(), end="")
        return 0
    text = render_explain(args.rule)
    if text is None:
        raise UsageError(f"no rule '{args.rule}'", hint="'verifier rules' lists them")
    print(text, end="")
    return 0


def _policy(args: argparse.Namespace) -> int:
    if args.action in ("explain", "rules"):
        return _rules(argparse.Namespace(rule=getattr(args, "rule", None)))
    if args.action == "show":
        return _policy_show(args)
    from verifier.gitio import Git
    from verifier.policy.loader import build_policy, file_layers

    root = Path(args.repo)
    if Git(root).ok(["rev-parse", "--show-toplevel"]):
        root = Git(root).toplevel()
    target = args.file if args.file is not None else root / "verifier.yaml"
    if not target.is_file():
        raise UsageError(f"no policy file {target}", hint="name one: verifier policy check FILE")
    policy = build_policy(file_layers(target, root, args.org_policy))
    print(
        f"{target}: valid (coverage threshold {policy.coverage_threshold:g}%, "
        f"wall limit {policy.limits.wall_seconds:g}s, {len(policy.overrides)} override(s), "
        f"{len(policy.waivers)} waiver(s))"
    )
    return 0


def _policy_show(args: argparse.Namespace) -> int:
    """The policy a change on top of the current HEAD would be judged by (HEAD is its base)."""
    from verifier.gitio import Git
    from verifier.policy.loader import build_policy, policy_layers
    from verifier.policy.view import render_show, render_show_json

    git = Git(Git(args.repo).toplevel())
    base = git.resolve("HEAD") if git.has_commits() else None
    layers = policy_layers(git, base, args.org_policy)
    build_policy(layers)  # the same checks as a real run (an expired waiver is an error here too)
    print(render_show_json(layers) if args.format == "json" else render_show(layers), end="")
    return 0


def _hooks(args: argparse.Namespace) -> int:
    from verifier.gitio import Git
    from verifier.integration import hooks

    git = Git(args.repo)
    git.toplevel()  # a clear message outside a repository
    if args.action == "status":
        print(f"hooks folder: {hooks.hooks_dir(git)}")
        for state in hooks.status(git):
            chained = " (runs the previous hook first)" if state.chained else ""
            print(f"  {state.name:<12} {state.state}{chained}")
        return 0
    if args.action == "install":
        names = [n for n in hooks.HOOK_NAMES if not (args.no_post_commit and n == "post-commit")]
        lines = hooks.install(git, names)
    else:
        lines = hooks.uninstall(git)
    print(f"hooks folder: {hooks.hooks_dir(git)}")
    for line in lines:
        print(f"  {line}")
    return 0


def _hook(args: argparse.Namespace) -> int:
    from verifier.integration.hooks import run_hook

    return run_hook(args.repo, args.name, args.hook_args, sys.stdin if args.name == "pre-push" else ())


def _audit(args: argparse.Namespace) -> int:
    from verifier.cli.audit import run_audit_command

    return run_audit_command(args)


def _demo(args: argparse.Namespace) -> int:
    from verifier.demo.scenario import run_demo

    return run_demo(args.dir, sandbox=args.sandbox)


def _sandbox(args: argparse.Namespace) -> int:
    if args.action == "build":
        from verifier.gitio import Git
        from verifier.sandbox.images import build_image

        git = Git(args.repo)
        tag = build_image(str(git.toplevel()), git.resolve(args.rev), lambda line: print(line, file=sys.stderr))
        print(tag)
        return 0
    from verifier.sandbox.doctor import doctor

    return doctor()


if __name__ == "__main__":  # pragma: no cover - python -m verifier.cli.main
    sys.exit(main())
