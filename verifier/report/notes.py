"""Git notes: the summary of a check travels with each commit it verified, under ``refs/notes/verifier``.

One JSON note per verified commit (format 1, the contract the audit reads). A check of a commit or a
range writes a note on every commit of the change; a re-run replaces the note. A ``--staged`` check has
no commit yet: its verdict waits under the git dir, keyed by the tree the index would commit, and the
post-commit hook turns it into a note on HEAD when HEAD's tree and parent match (see
:func:`save_pending` and :func:`note_pending`). A commit made with the gate skipped gets no note, and the
audit counts a machine-written commit without a note as unverified.

Format 1 fields: format, tool, version, checked_at, commit, range {base, head}, verdict, agent,
machine_lines (lines of the final diff attributed to this commit), coverage {executable, covered, percent}
and tests {run, failed} and findings and waivers (all for the whole checked change), sandbox; added since:
mutants {killed, survived, accepted, not_run, error, score} (the mutation stage's counts, or null).
"""

from __future__ import annotations

import contextlib
import json
import os
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from verifier.errors import GitError
from verifier.gitio import Git
from verifier.models import INDEX, Report

DEFAULT_REF = "refs/notes/verifier"
NOTE_FORMAT = 1
PENDING_MAX_AGE = 3600.0  # seconds: an older staged verdict is stale (the commit it was for never happened)
_FALLBACK_IDENTITY = ("-c", "user.name=verifier", "-c", "user.email=verifier@localhost")


def configured_ref(git: Git, given: str | None = None) -> str:
    """The notes ref to use: the one given, else git config ``verifier.notesRef``, else the default."""
    if given:
        return _full_ref(given)
    configured = git.run(["config", "--get", "verifier.notesRef"], check=False).decode().strip()
    return _full_ref(configured) if configured else DEFAULT_REF


def notes_enabled(git: Git) -> bool:
    """Whether the hooks write notes (git config ``verifier.notes``, default true)."""
    value = git.run(["config", "--type=bool", "--get", "verifier.notes"], check=False).decode().strip()
    return value != "false"


def _full_ref(ref: str) -> str:
    return ref if ref.startswith("refs/") else f"refs/notes/{ref}"


# -- the note body ----------------------------------------------------------------------------------


def note_body(report: Report, commit: str, checked_at: str | None = None) -> dict[str, Any]:
    """The format-1 note for ``commit``, one of the commits (or the pending commit) of ``report``."""
    from verifier import __version__

    change, run, coverage = report.change, report.run, report.coverage
    mark = report.provenance.marks.get(commit)
    return {
        "format": NOTE_FORMAT,
        "tool": "verifier",
        "version": __version__,
        "checked_at": checked_at or _now(),
        "commit": commit,
        "range": {"base": change.base, "head": commit if change.head == INDEX else change.head},
        "verdict": report.verdict,
        "agent": mark.agent if mark else None,
        "machine_lines": _lines_of(report, commit),
        "coverage": {
            "executable": coverage.executable if coverage else 0,
            "covered": coverage.covered if coverage else 0,
            "percent": coverage.percent if coverage else None,
        },
        "tests": {
            "run": len(run.tests) if run else 0,
            "failed": (run.count("failed") + run.count("error")) if run else 0,
        },
        "findings": [
            {"rule": f.rule, "severity": f.severity, "path": f.path, "line": f.line, "message": f.message}
            for f in report.findings
        ],
        "waivers": [  # the policy's waivers that turned a finding of this change into info
            {"rule": w.rule, "path": w.path, "reason": w.reason, "owner": w.owner, "expires": w.expires}
            for w in getattr(report, "waivers_used", ())
        ],
        "sandbox": run.backend if run else None,
        "mutants": _mutant_counts(report),
    }


def _mutant_counts(report: Report) -> dict[str, Any] | None:
    """The mutation stage's counts for the whole change (None when the stage did not run)."""
    from verifier.mutation.counts import mutation_counts

    counts = mutation_counts(report)
    if counts is None:
        return None
    return {key: counts[key] for key in ("killed", "survived", "accepted", "not_run", "error", "score")}


def _lines_of(report: Report, commit: str) -> int:
    """How many machine-written lines of the final diff ``commit`` introduced."""
    if report.change.head == INDEX:
        return report.provenance.machine_line_count
    total = 0
    for path, lines in report.provenance.machine_lines.items():
        owners = report.provenance.line_commits.get(path, {})
        total += sum(1 for line in lines if owners.get(line) == commit)
    return total


def _now() -> str:
    return datetime.now(timezone.utc).replace(microsecond=0).isoformat().replace("+00:00", "Z")


# -- writing and reading ------------------------------------------------------------------------------


def write_note(git: Git, commit: str, body: dict[str, Any], ref: str = DEFAULT_REF) -> None:
    """Attach ``body`` to ``commit`` under ``ref``, replacing any note there."""
    text = json.dumps(body, indent=2, sort_keys=True) + "\n"
    identity = () if git.ok(["var", "GIT_COMMITTER_IDENT"]) else _FALLBACK_IDENTITY
    git.run([*identity, "notes", f"--ref={ref}", "add", "--force", "--file=-", commit], input=text.encode())


def write_notes(git: Git, report: Report, ref: str = DEFAULT_REF) -> list[str]:
    """Write one note per commit of a checked commit or range; return the annotated shas.

    A ``--staged`` report has no commit to annotate: nothing is written (see :func:`save_pending`)."""
    if report.change.head == INDEX:
        return []
    checked_at = _now()
    shas = [commit.sha for commit in report.change.commits]
    for sha in shas:
        write_note(git, sha, note_body(report, sha, checked_at), ref)
    return shas


def read_notes(git: Git, ref: str = DEFAULT_REF) -> dict[str, dict[str, Any]]:
    """Every note under ``ref``, by commit sha. A note that is not a JSON object comes back as
    ``{"format": None, "invalid": "<why>", "text": "<the note>"}``: check ``format`` before reading fields."""
    notes: dict[str, dict[str, Any]] = {}
    for sha, text in git.read_notes(ref):
        try:
            body = json.loads(text)
        except ValueError as error:
            notes[sha] = {"format": None, "invalid": f"not JSON: {error}", "text": text}
            continue
        notes[sha] = body if isinstance(body, dict) else {"format": None, "invalid": "not an object", "text": text}
    return notes


# -- staged verdicts, waiting for their commit ---------------------------------------------------------


def state_dir(git: Git) -> Path:
    """The gate's own folder under the (per-worktree) git dir: pending verdicts, the saved message."""
    return (git.repo / git.text(["rev-parse", "--git-path", "verifier"])).resolve()


def staged_tree(git: Git, index_file: str | None = None) -> str:
    """The tree the index would commit, computed on a copy so that the user's index is never rewritten."""
    source = Path(index_file) if index_file else git.git_dir() / "index"
    with tempfile.TemporaryDirectory(prefix="verifier-index-") as scratch:
        copy = Path(scratch) / "index"
        if source.is_file():
            copy.write_bytes(source.read_bytes())
        env_git = Git(git.repo, index_file=str(copy))
        return env_git.text(["write-tree"])


def save_pending(git: Git, report: Report, tree: str) -> Path:
    """Keep a passing staged verdict until the post-commit hook finds the commit it became."""
    folder = state_dir(git) / "pending"
    folder.mkdir(parents=True, exist_ok=True)
    _drop_stale(folder)
    body = note_body(report, INDEX)
    target = folder / f"{tree}.json"
    target.write_text(json.dumps({"saved_at": time.time(), "base": report.change.base, "note": body}) + "\n")
    return target


def note_pending(git: Git, ref: str = DEFAULT_REF) -> str | None:
    """Turn the staged verdict for HEAD's tree into a note on HEAD; return HEAD's sha when one was written."""
    folder = state_dir(git) / "pending"
    if not folder.is_dir():
        return None
    head = git.resolve("HEAD")
    tree = git.text(["rev-parse", f"{head}^{{tree}}"])
    pending = folder / f"{tree}.json"
    written = None
    if pending.is_file():
        saved = json.loads(pending.read_text())
        fresh = time.time() - float(saved.get("saved_at", 0)) < PENDING_MAX_AGE
        if fresh and saved.get("base") == git.first_parent(head):
            body = {**saved["note"], "commit": head, "range": {"base": saved.get("base"), "head": head}}
            write_note(git, head, body, ref)
            written = head
    _clear(folder)
    return written


def _drop_stale(folder: Path) -> None:
    for old in folder.glob("*.json"):
        try:
            if time.time() - old.stat().st_mtime >= PENDING_MAX_AGE:
                old.unlink()
        except OSError:
            pass


def _clear(folder: Path) -> None:
    for leftover in folder.glob("*.json"):
        leftover.unlink(missing_ok=True)
    with contextlib.suppress(OSError):
        os.rmdir(folder)  # only when empty: something else may have put a file there


def try_write_notes(git: Git, report: Report, ref: str) -> str | None:
    """Write the notes of ``report``; return a warning instead of failing (a note is a record, not a verdict)."""
    try:
        write_notes(git, report, ref)
    except GitError as error:
        return f"could not write the git notes under {ref}: {error}"
    return None
