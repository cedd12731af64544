"""Git hooks: installing the shims of ``hooks/`` and what each runs (``verifier hook <name>``).

``install`` writes the shims into the repository's effective hooks folder (``git rev-parse --git-path
hooks``, which honours ``core.hooksPath`` and resolves a linked worktree to the shared folder), with the
interpreter and the package folder of this verifier written in, so a hook runs the verifier that installed
it. A hook already there is renamed ``<name>.verifier-chained`` and run first by the shim (both must pass);
``uninstall`` puts it back. Installing twice changes nothing.

The runners: ``commit-msg`` verifies the staged change when the message carries the trailer, and on a block
leaves index and working tree alone and saves the message for ``git commit -F``; ``post-commit`` turns the
staged verdict into a note on the new commit; ``pre-push`` verifies the machine-written commits of each
pushed range. Imports stay light at module level: the commit-msg fast path must not pay for the pipeline.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from verifier.errors import EXIT_PASS, EXIT_USAGE, UsageError, VerifierError

if TYPE_CHECKING:
    from verifier.gitio import Git
    from verifier.models import Report

HOOK_NAMES = ("commit-msg", "pre-push", "post-commit")
MARKER = "# verifier-managed hook"
CHAINED_SUFFIX = ".verifier-chained"
BYPASS_ENV = "VERIFIER_BYPASS"  # its value is the reason, required, printed and kept in the commit's note
BYPASS_HINT = (
    'bypass once in an emergency with VERIFIER_BYPASS="the reason" (or --no-verify); the audit lists such '
    "commits as unverified"
)
MAX_REASON_CHARS = 300


# -- locating ----------------------------------------------------------------------------------------


def shipped_dir() -> Path:
    """Where the hook shims are: inside the installed wheel, or the source checkout's ``hooks/``."""
    package = Path(__file__).resolve().parents[1]
    installed = package / "_hooks"
    return installed if installed.is_dir() else package.parent / "hooks"


def hooks_dir(git: Git) -> Path:
    """The folder git runs hooks from for this repository (core.hooksPath, linked worktrees)."""
    return (git.repo / git.text(["rev-parse", "--git-path", "hooks"])).resolve()


def package_home() -> Path:
    """The folder that holds the ``verifier`` package the hooks must import."""
    return Path(__file__).resolve().parents[2]


def hook_text(name: str, python: str | None = None, home: str | None = None) -> str:
    """The shim ``name`` with the interpreter and package folder written in."""
    template = (shipped_dir() / name).read_text(encoding="utf-8")
    return template.replace("@VERIFIER_PYTHON@", _sh_quote(python or sys.executable)).replace(
        "@VERIFIER_HOME@", _sh_quote(home or str(package_home()))
    )


def _sh_quote(text: str) -> str:
    return "'" + text.replace("'", "'\\''") + "'"


# -- install, uninstall, status ----------------------------------------------------------------------


@dataclass(frozen=True)
class HookState:
    """One hook in the hooks folder: ``installed``, ``outdated`` (ours, another interpreter or version),
    ``other`` (not ours: ours is not installed) or ``absent``; ``chained`` when ours runs a kept hook first."""

    name: str
    path: Path
    state: str
    chained: bool


def _is_ours(path: Path) -> bool:
    try:
        return MARKER in path.read_text(encoding="utf-8", errors="replace")[:400]
    except OSError:
        return False


def _present(path: Path) -> bool:
    return path.exists() or path.is_symlink()


def _write_executable(path: Path, text: str) -> None:
    temporary = path.with_name(f".{path.name}.verifier-tmp")
    temporary.write_text(text, encoding="utf-8")
    temporary.chmod(0o755)
    os.replace(temporary, path)


def install(git: Git, names: Sequence[str] = HOOK_NAMES, python: str | None = None) -> list[str]:
    """Install the hooks ``names``; return one line per hook saying what was done."""
    folder = hooks_dir(git)
    folder.mkdir(parents=True, exist_ok=True)
    done = []
    for name in names:
        target, chained = folder / name, folder / f"{name}{CHAINED_SUFFIX}"
        wanted = hook_text(name, python)
        if _present(target) and _is_ours(target):
            if target.read_text(encoding="utf-8") == wanted:
                done.append(f"{name}: already installed")
                continue
            _write_executable(target, wanted)
            done.append(f"{name}: updated")
            continue
        if _present(target):
            if _present(chained):
                raise UsageError(
                    f"{target} exists and so does {chained}",
                    hint="decide which of the two to keep, remove the other, and install again",
                )
            os.rename(target, chained)
        _write_executable(target, wanted)
        done.append(
            f"{name}: installed"
            + (f" (runs the existing hook first, kept as {chained.name})" if _present(chained) else "")
        )
    return done


def uninstall(git: Git) -> list[str]:
    """Remove our hooks and put back the hooks they chained; a hook that is not ours is left alone."""
    folder = hooks_dir(git)
    done = []
    for name in HOOK_NAMES:
        target, chained = folder / name, folder / f"{name}{CHAINED_SUFFIX}"
        if _present(target) and not _is_ours(target):
            done.append(f"{name}: not ours, left alone" + (f" ({chained.name} kept)" if _present(chained) else ""))
            continue
        had_ours = _present(target)
        if had_ours:
            target.unlink()
        if _present(chained):
            os.rename(chained, target)
            done.append(f"{name}: removed; the previous hook is back")
        else:
            done.append(f"{name}: removed" if had_ours else f"{name}: not installed")
    return done


def status(git: Git, python: str | None = None) -> list[HookState]:
    folder = hooks_dir(git)
    states = []
    for name in HOOK_NAMES:
        target, chained = folder / name, folder / f"{name}{CHAINED_SUFFIX}"
        if not _present(target):
            state = "absent"
        elif not _is_ours(target):
            state = "other"
        else:
            state = "installed" if target.read_text(encoding="utf-8") == hook_text(name, python) else "outdated"
        states.append(HookState(name, target, state, _present(chained)))
    return states


# -- what the hooks run --------------------------------------------------------------------------------


def run_hook(repo: str, name: str, args: Sequence[str], stdin: Iterable[str] = ()) -> int:
    """Entry point of ``verifier hook <name> ARGS`` (the shims call it)."""
    if name == "commit-msg":
        if len(args) != 1:
            raise UsageError("the commit-msg hook takes the message file", hint="verifier hook commit-msg FILE")
        return commit_msg(repo, Path(args[0]))
    if name == "post-commit":
        return post_commit(repo)
    if name == "pre-push":
        return pre_push(repo, list(stdin), args)
    raise UsageError(f"no hook '{name}'", hint=f"one of {', '.join(HOOK_NAMES)}")


def _say(text: str) -> None:
    print(f"verifier: {text}", file=sys.stderr)


def commit_msg(repo: str, message_file: Path) -> int:
    """Verify the staged change when the message is marked; on a block, save the message for reuse."""
    try:
        message = message_file.read_text(encoding="utf-8", errors="replace")
    except OSError as error:
        raise UsageError(f"cannot read the message file {message_file}: {error.strerror}") from error
    from verifier.gitio import Git
    from verifier.provenance.trailers import machine_mark

    marked = machine_mark(message) is not None
    probe = Git(repo)
    if not marked and not probe.ok(["rev-parse", "--git-dir"]):
        return EXIT_PASS  # outside a repository there is no policy to keep valid
    index_file = os.path.abspath(os.environ["GIT_INDEX_FILE"]) if os.environ.get("GIT_INDEX_FILE") else None
    git = Git(probe.toplevel(), index_file=index_file)
    from verifier.policy.guard import staged_policy_problem

    problem = staged_policy_problem(git)
    if problem:
        _say(problem)
        _refuse_commit(git, message_file, "the commit is stopped: it would leave the policy broken")
        return EXIT_USAGE
    if not marked:
        return EXIT_PASS
    try:
        report = _verify(git, None, staged_message=message, index_file=index_file)
    except VerifierError as error:
        _say(str(error))
        _refuse_commit(git, message_file, "the staged change could not be verified, so the commit is stopped")
        return error.exit_code
    _print_report(report)
    if report.verdict in ("block", "error"):
        _refuse_commit(git, message_file, "the commit is stopped; the index and working tree are as they were")
        return _exit_code(report)
    from verifier.report import notes

    if notes.notes_enabled(git):
        notes.save_pending(git, report, notes.staged_tree(git, index_file))
    return EXIT_PASS


def _refuse_commit(git: Git, message_file: Path, why: str) -> None:
    saved = save_message(git, message_file)
    _say(why)
    _say(f"your message is saved; once fixed, commit with: git commit -F {saved}")
    _say(BYPASS_HINT)


def save_message(git: Git, message_file: Path) -> Path:
    """Keep the pending message, cleaned as git cleans an edited one, as ``<git dir>/verifier/last-message``."""
    from verifier.report.notes import state_dir

    text = message_file.read_bytes()
    cut = text.find(b"\n# ------------------------ >8 ------------------------\n")
    if cut >= 0:  # `git commit -v`: the diff below the scissors line is not part of the message
        text = text[: cut + 1]
    cleaned = git.run(["stripspace", "--strip-comments"], input=text)
    folder = state_dir(git)
    folder.mkdir(parents=True, exist_ok=True)
    target = folder / "last-message"
    target.write_bytes(cleaned)
    return target


def post_commit(repo: str) -> int:
    """Write the note for the commit just made, from the verdict commit-msg reached on its tree."""
    from verifier.gitio import Git
    from verifier.report import notes

    git = Git(Git(repo).toplevel())
    reason = bypass_reason()
    if reason is not None:
        return _record_bypass(git, reason)
    try:
        written = notes.note_pending(git, notes.configured_ref(git))
    except VerifierError as error:
        _say(f"could not write the note for the new commit: {error}")
        return EXIT_PASS
    if written:
        _say(f"verdict recorded as a git note on {written[:12]}")
    return EXIT_PASS


def bypass_reason() -> str | None:
    """The reason given in ``$VERIFIER_BYPASS``, printable and cut short; None when no bypass is asked for."""
    from verifier.report.text import printable

    given = " ".join(os.environ.get(BYPASS_ENV, "").split())
    return printable(given[:MAX_REASON_CHARS]) if given else None


def _record_bypass(git: Git, reason: str) -> int:
    """The commit just made bypassed the gate: a machine-written one gets a skipped entry with the reason."""
    from verifier.provenance.trailers import machine_mark
    from verifier.report import notes

    head = git.text(["rev-parse", "HEAD"])
    if machine_mark(git.text(["log", "-1", "--format=%B", head])) is None or not notes.notes_enabled(git):
        return EXIT_PASS
    try:
        ref = notes.configured_ref(git)
        notes.record_skipped(git, [head], "commit-hook", f"bypassed by {BYPASS_ENV}: {reason}", ref)
    except VerifierError as error:
        _say(f"could not record the bypass in the note of the new commit: {error}")
        return EXIT_PASS
    _say(f"bypassed by {BYPASS_ENV}: {reason} (recorded as a git note on {head[:12]})")
    return EXIT_PASS


# -- pre-push --------------------------------------------------------------------------------------------


def pre_push(repo: str, lines: Sequence[str], args: Sequence[str] = ()) -> int:
    """Verify every pushed range that holds machine-written commits; refuse the push when one fails."""
    from verifier.gitio import Git

    git = Git(Git(repo).toplevel())
    remote = args[0] if args else None
    specs = [
        spec for line in lines if line.strip() for spec in pushed_specs(git, *_push_line(line), remote_name=remote)
    ]
    from verifier.policy.guard import pushed_policy_problem

    worst = EXIT_PASS
    for problem in filter(None, (pushed_policy_problem(git, spec) for spec in specs)):
        _say(problem)
        _say("the push is refused: fix the policy in a new commit and push again")
        worst = EXIT_USAGE
    for spec in specs:
        if not _has_machine_commits(git, spec):
            continue
        _say(f"verifying the pushed commits {spec}")
        try:
            report = _verify(git, spec)
        except VerifierError as error:
            _say(str(error))
            worst = max(worst, error.exit_code)
            continue
        _print_report(report)
        base = report.change.base[:12] if report.change.base else "none"
        _say(f"judged by the policy at {base}, the base of {spec}: {report.policy_source}")
        _record(git, report)
        worst = max(worst, _exit_code(report))
    if worst != EXIT_PASS:
        _say("the push is refused: a pushed machine-written commit does not pass the gate")
        _say(BYPASS_HINT)
    return worst


def _push_line(line: str) -> tuple[str, str]:
    """``<local ref> <local sha> <remote ref> <remote sha>`` (githooks(5), pre-push) -> (local sha, remote sha)."""
    fields = line.split()
    if len(fields) != 4:
        raise UsageError(
            f"unexpected pre-push input line: {line.strip()!r}",
            hint="git gives '<local ref> <local sha> <remote ref> <remote sha>' per line",
        )
    return fields[1], fields[3]


def _is_zero(sha: str) -> bool:
    return set(sha) == {"0"}


def pushed_specs(git: Git, local: str, remote: str, remote_name: str | None = None) -> list[str]:
    """The revision specs to verify for one pushed ref: none for a deletion; ``remote..local`` for a
    fast-forward; from the merge-base for a force push; for a new branch, from where it left the remote's
    main line (the remote's HEAD, else its main or master branch, when known here), else from the parent
    of the oldest commit that no remote-tracking ref holds (a root commit is checked on its own)."""
    if _is_zero(local):
        return []
    known = [remote] if not _is_zero(remote) else _remote_main_line(git, remote_name)
    for tip in known:
        if not git.ok(["cat-file", "-e", f"{tip}^{{commit}}"]):
            continue
        base = git.merge_base(tip, local)  # == tip for a fast-forward
        if base == local:
            return []
        if base:
            return [f"{base}..{local}"]
    new = git.run(["rev-list", "--topo-order", "--reverse", local, "--not", "--remotes"]).decode().split()
    if not new:
        return []
    parent = git.first_parent(new[0])
    if parent:
        return [f"{parent}..{local}"]
    return [new[0]] + ([f"{new[0]}..{local}"] if local != new[0] else [])


def _remote_main_line(git: Git, remote_name: str | None) -> list[str]:
    """The tips of the remote's main line (its HEAD, then main and master), as the remote reports them."""
    if not remote_name:
        return []
    out = git.run(["ls-remote", "--symref", remote_name, "HEAD", "refs/heads/main", "refs/heads/master"], check=False)
    tips = {}
    for line in out.decode("utf-8", "replace").splitlines():
        sha, _, ref = line.partition("\t")
        if not sha.startswith("ref:"):
            tips[ref] = sha
    return [tips[ref] for ref in ("HEAD", "refs/heads/main", "refs/heads/master") if ref in tips]


def _has_machine_commits(git: Git, spec: str) -> bool:
    from verifier.provenance.trailers import machine_mark

    if ".." in spec:
        left, right = spec.split("..", 1)
        shas = git.rev_list(left, right)
    else:
        shas = [spec]
    return any(machine_mark(commit.message) is not None for commit in git.commits(shas))


# -- shared by the runners ----------------------------------------------------------------------------


def _verify(git: Git, spec: str | None, staged_message: str | None = None, index_file: str | None = None) -> Report:
    from verifier.change.stage import RevisionSpec
    from verifier.pipeline import Options, verify

    sandbox = git.run(["config", "--get", "verifier.sandbox"], check=False).decode().strip() or "auto"
    if staged_message is not None:
        revision = RevisionSpec(staged=True, message=staged_message)
    else:
        revision = RevisionSpec(text=spec)
    return verify(git.repo, revision, Options(sandbox=sandbox, index_file=index_file))


def _print_report(report: Report) -> None:
    from verifier.report.text import render, wants_colour

    print(render(report, colour=wants_colour(sys.stderr), quiet=True), end="", file=sys.stderr)


def _record(git: Git, report: Report) -> None:
    from verifier.report import notes

    if notes.notes_enabled(git):
        warning = notes.try_write_notes(git, report, notes.configured_ref(git), how="pre-push")
        if warning:
            _say(warning)


def _exit_code(report: Report) -> int:
    from verifier.verdict.decision import EXIT_CODES

    return EXIT_CODES[report.verdict] if report.verdict != "pass" else EXIT_PASS
