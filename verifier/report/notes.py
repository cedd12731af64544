"""Git notes: the record of every check travels with each commit it checked, under ``refs/notes/verifier``.

This module owns the note format both ways: it builds the entry a check adds (:func:`check_entry`), writes
notes (:func:`write_notes`), and reads them back (:func:`parse_note`, :func:`read_record`) for the audit and
anyone else. One JSON note per commit; a check appends one entry to the note of each commit of the checked
change and never erases what an earlier check recorded.

Note formats (``format``; one line per version):
  1: one check per note, replaced by the next one: format, tool, version, checked_at, commit, range {base,
     head}, verdict (of the whole checked change), agent, machine_lines, coverage, tests, findings and waivers
     (all of the whole change), sandbox. Still read (as one entry of unknown origin), never written.
  2: {format, tool, commit, checks: [entry, ...], dropped}: one entry per check, oldest first, newest last,
     at most :data:`MAX_CHECKS` (the oldest are dropped first; ``dropped`` counts them).

A format-2 entry says what one check found about *this* commit:
  - ``checked_at``, ``version`` (of the verifier), ``how``: one of :data:`HOW` (commit-hook, pre-push, ci,
    by-hand, audit-recheck); ``skipped``: true when the gate was asked to run and did not (then ``verdict``
    is null and ``reason`` says why).
  - ``verdict``: the verdict on this commit's own lines: the findings located on lines this commit
    introduced (by the attribution the gate computes, ``Provenance.line_commits``) plus the whole-change
    facts that cannot be located on one commit (a failing test, a run that could not complete), which are
    listed under ``range.findings``. A commit with no machine-written lines has nothing of its own to judge:
    its verdict is ``pass`` and the whole-change facts are not applied to it (they stay under ``range``),
    so it never gets ``block``.
  - ``agent``, ``machine_lines`` (machine-written lines of the final diff this commit introduced),
    ``findings`` (its own, each {rule, severity, path, line, message}), ``waivers`` (the policy's waivers
    that turned one of this entry's findings into info), ``coverage`` {executable, covered, percent} and
    ``tests`` {run, failed} (of the whole checked change), ``sandbox``, ``mutants`` {killed, survived,
    accepted, not_run, error, score} (the mutation stage's counts, or null).
  - ``range``: {base, head, commits (how many the check covered), verdict (of the whole change), findings
    (the whole-change facts), finding_counts (the whole change's findings per rule, exact)}.
  Each list of findings keeps at most :data:`MAX_FINDINGS`, the most severe first (``findings_left_out``
  counts the rest), each message at most :data:`MAX_MESSAGE_CHARS`; ``range.finding_counts`` counts the
  whole change's findings per rule, exactly. A note stays under :data:`MAX_NOTE_BYTES`: the oldest entries
  are dropped (and counted in ``dropped``) until it fits. Control characters are JSON escapes; bytes of a
  name that are not UTF-8 are written ``\\xNN`` (:func:`verifier.report.bounds.valid_text`).

A ``--staged`` check has no commit yet: its entry waits under the git dir, keyed by the tree the index would
commit, and the post-commit hook appends it to HEAD's note when HEAD's tree and parent match (see
:func:`save_pending` and :func:`note_pending`). A commit made with the gate skipped gets no entry from its
commit hook (the audit shows it as skipped at commit time); :func:`record_skipped` appends an explicit one.
"""

from __future__ import annotations

import contextlib
import json
import os
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from verifier.errors import GitError
from verifier.gitio import Git
from verifier.models import INDEX, Finding, Report
from verifier.report.bounds import rule_counts, shortened, valid_text

DEFAULT_REF = "refs/notes/verifier"
NOTE_FORMAT = 2
READABLE_FORMATS = (1, 2)
MAX_CHECKS = 20  # entries kept per note: a commit checked more often keeps its newest twenty
MAX_FINDINGS = 25  # findings kept per list of an entry (notes are pushed: the report has the rest)
MAX_MESSAGE_CHARS = 300  # characters of each finding's message in a note
MAX_NOTE_BYTES = 64_000  # a note's size at most: older entries are dropped to stay under it
HOW = ("commit-hook", "pre-push", "ci", "by-hand", "audit-recheck")
PENDING_MAX_AGE = 3600.0  # seconds: an older staged verdict is stale (the commit it was for never happened)
_FALLBACK_IDENTITY = ("-c", "user.name=verifier", "-c", "user.email=verifier@localhost")
_UNREADABLE_KEPT = 4000  # characters of an unreadable earlier note kept when a check appends to it


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


def expand_notes_ref(ref: str) -> str:
    """The full name of a notes ref as git expands ``--notes=<ref>`` and ``--ref=<ref>`` (from memory of
    git's notes.c): ``refs/notes/X`` stays, ``notes/X`` gains ``refs/``, anything else ``refs/notes/``."""
    if ref.startswith("refs/notes/"):
        return ref
    return f"refs/{ref}" if ref.startswith("notes/") else f"refs/notes/{ref}"


def default_how() -> str:
    """How a check not run by a hook ran: ``ci`` when the ``CI`` environment variable is set (common
    practice: CI services set it), else ``by-hand``."""
    return "ci" if os.environ.get("CI", "").strip().lower() not in ("", "0", "false") else "by-hand"


# -- building an entry --------------------------------------------------------------------------------


def check_entry(report: Report, commit: str, how: str, checked_at: str | None = None) -> dict[str, Any]:
    """The entry the check ``report`` adds to the note of ``commit`` (one of its commits, or INDEX)."""
    from verifier import __version__
    from verifier.verdict.decision import decide

    change, run, coverage = report.change, report.run, report.coverage
    mark = report.provenance.marks.get(commit)
    own, range_facts = split_findings(report, commit)
    machine_lines = _lines_of(report, commit)
    judged = own + range_facts if machine_lines else []
    kept_own, own_left_out = _capped(own)
    kept_range, range_left_out = _capped(range_facts)
    entry: dict[str, Any] = {
        "checked_at": checked_at or _now(),
        "version": __version__,
        "how": how,
        "skipped": False,
        "verdict": decide(judged),
        "agent": mark.agent if mark else None,
        "machine_lines": machine_lines,
        "findings": [_finding(f) for f in kept_own],
        "waivers": _waivers_of(report, own + range_facts),
        "coverage": {
            "executable": coverage.executable if coverage else 0,
            "covered": coverage.covered if coverage else 0,
            "percent": coverage.percent if coverage else None,
        },
        "tests": {
            "run": len(run.tests) if run else 0,
            "failed": (run.count("failed") + run.count("error")) if run else 0,
        },
        "sandbox": run.backend if run else None,
        "range": {
            "base": change.base,
            "head": commit if change.head == INDEX else change.head,
            "commits": len(change.commits),
            "verdict": report.verdict,
            "findings": [_finding(f) for f in kept_range],
            "finding_counts": rule_counts(report),
        },
        "mutants": _mutant_counts(report),
    }
    if own_left_out or range_left_out:
        entry["findings_left_out"] = own_left_out + range_left_out
    return entry


def skipped_entry(how: str, reason: str, checked_at: str | None = None) -> dict[str, Any]:
    """The entry of a check that was asked for and did not run (``VERIFIER_BYPASS``, ``--no-verify``)."""
    from verifier import __version__

    return {
        "checked_at": checked_at or _now(),
        "version": __version__,
        "how": how,
        "skipped": True,
        "reason": reason,
        "verdict": None,
        "findings": [],
        "waivers": [],
    }


def split_findings(report: Report, commit: str) -> tuple[list[Finding], list[Finding]]:
    """(this commit's own findings, the whole-change facts) of ``report``.

    A finding is located when its path and line are a line some commit of the change introduced; it is
    that commit's. A finding without a line that sums up located findings of its rule (a coverage total,
    one file's coverage) belongs to the commits of those findings. Anything else cannot be put on one
    commit: it is a fact of the whole change."""
    owners = _owners(report)
    located: dict[tuple[str, str | None], set[str]] = {}
    for finding in report.findings:
        if (owner := owners(finding)) is not None:
            located.setdefault((finding.rule, None), set()).add(owner)
            located.setdefault((finding.rule, finding.path), set()).add(owner)
    own: list[Finding] = []
    range_facts: list[Finding] = []
    for finding in report.findings:
        owner = owners(finding)
        if owner is not None:
            if owner == commit:
                own.append(finding)
            continue
        summed = located.get((finding.rule, finding.path)) if finding.line is None else None
        if summed:
            if commit in summed:
                own.append(finding)
            continue
        range_facts.append(finding)
    return own, range_facts


def _owners(report: Report) -> Callable[[Finding], str | None]:
    line_commits = report.provenance.line_commits
    in_change = {c.sha for c in report.change.commits}

    def owner(finding: Finding) -> str | None:
        if finding.path is None or finding.line is None:
            return None
        sha = line_commits.get(finding.path, {}).get(finding.line)
        return sha if sha in in_change else None

    return owner


def _finding(finding: Finding) -> dict[str, Any]:
    return {
        "rule": finding.rule,
        "severity": finding.severity,
        "path": finding.path,
        "line": finding.line,
        "message": shortened(finding.message, MAX_MESSAGE_CHARS),
    }


_WEIGHT = {"error": 0, "block": 1, "warn": 2, "info": 3}


def _capped(findings: list[Finding]) -> tuple[list[Finding], int]:
    """The first :data:`MAX_FINDINGS` of ``findings``, the most severe first, and how many are left out."""
    ordered = sorted(findings, key=lambda finding: _WEIGHT.get(finding.severity, 0))
    return ordered[:MAX_FINDINGS], max(0, len(findings) - MAX_FINDINGS)


def _waivers_of(report: Report, findings: Iterable[Finding]) -> list[dict[str, Any]]:
    """The policy's waivers that turned one of ``findings`` into info (by the waiver's source line)."""
    sources = {w.get("source") for f in findings if isinstance(w := f.details.get("waived_by"), Mapping)}
    return [
        {"rule": w.rule, "path": w.path, "reason": w.reason, "owner": w.owner, "expires": w.expires}
        for w in report.waivers_used
        if w.source in sources
    ]


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


# -- the note: appending an entry ------------------------------------------------------------------------


def appended(previous: Mapping[str, Any] | None, commit: str, entry: Mapping[str, Any]) -> dict[str, Any]:
    """The note of ``commit`` after adding ``entry`` to ``previous`` (its current body, parsed; None when
    it has none): earlier entries kept (a format-1 note becomes the first entry, marked ``format_1``), the
    newest last, at most :data:`MAX_CHECKS`."""
    earlier: list[Any] = []
    dropped = 0
    kept_text = None
    if previous is not None:
        earlier = [dict(e) for e in _raw_checks(previous)]
        dropped = int(previous.get("dropped") or 0) if previous.get("format") == NOTE_FORMAT else 0
        if previous.get("format") not in READABLE_FORMATS:
            kept_text = str(previous.get("text") or previous.get("invalid") or "")[:_UNREADABLE_KEPT]
    checks = [*earlier, dict(entry)]
    if len(checks) > MAX_CHECKS:
        dropped += len(checks) - MAX_CHECKS
        checks = checks[-MAX_CHECKS:]
    body: dict[str, Any] = {"format": NOTE_FORMAT, "tool": "verifier", "commit": commit, "checks": checks}
    if kept_text:
        body["unreadable_earlier_note"] = kept_text
    elif previous is not None and previous.get("unreadable_earlier_note"):
        body["unreadable_earlier_note"] = previous["unreadable_earlier_note"]
    while len(body["checks"]) > 1 and len(_note_text({**body, "dropped": dropped + 1})) > MAX_NOTE_BYTES:
        body["checks"] = body["checks"][1:]
        dropped += 1
    if dropped:
        body["dropped"] = dropped
    return body


def _raw_checks(body: Mapping[str, Any]) -> list[Mapping[str, Any]]:
    """The entries of a parsed note, oldest first: a format-1 note is one entry; an unreadable one none."""
    if body.get("format") == 1:
        old = {k: v for k, v in body.items() if k not in ("format", "tool", "commit")}
        return [{**old, "how": old.get("how", "unknown"), "skipped": False, "format_1": True}]
    if body.get("format") == NOTE_FORMAT and isinstance(body.get("checks"), list):
        return [e for e in body["checks"] if isinstance(e, Mapping)]
    return []


# -- writing ---------------------------------------------------------------------------------------------


def write_note(git: Git, commit: str, body: Mapping[str, Any], ref: str = DEFAULT_REF) -> None:
    """Attach ``body`` to ``commit`` under ``ref``, in place of the note there (use :func:`add_entries`
    to add a check: it keeps what the note held)."""
    text = _note_text(body)
    identity = () if git.ok(["var", "GIT_COMMITTER_IDENT"]) else _FALLBACK_IDENTITY
    git.run([*identity, "notes", f"--ref={ref}", "add", "--force", "--file=-", commit], input=text.encode())


def _note_text(body: Mapping[str, Any]) -> str:
    return json.dumps(valid_text(body), indent=2, sort_keys=True) + "\n"


def add_entries(git: Git, entries: Mapping[str, Mapping[str, Any]], ref: str = DEFAULT_REF) -> None:
    """Append ``entries[sha]`` to the note of each ``sha`` (their current notes read in one batch)."""
    current = _current_notes(git, ref, list(entries))
    for sha, entry in entries.items():
        write_note(git, sha, appended(current.get(sha), sha, entry), ref)


def _current_notes(git: Git, ref: str, shas: Sequence[str]) -> dict[str, dict[str, Any]]:
    wanted = set(shas)
    blob_of = {sha: blob for sha, blob in git.note_blobs(ref).items() if sha in wanted}
    blobs = git.read_blobs(sorted(set(blob_of.values())))
    found = {}
    for sha, blob in blob_of.items():
        if blob in blobs:
            text = blobs[blob].decode("utf-8", "replace")
            body = parse_note(text)
            found[sha] = {**body, "text": text} if "invalid" in body else body
    return found


def write_notes(git: Git, report: Report, ref: str = DEFAULT_REF, how: str | None = None) -> list[str]:
    """Add this check's entry to the note of every commit of a checked commit or range; return the shas.
    ``how``: one of :data:`HOW` (default :func:`default_how`).

    A ``--staged`` report has no commit to annotate: nothing is written (see :func:`save_pending`)."""
    if report.change.head == INDEX:
        return []
    checked_at = _now()
    entries = {c.sha: check_entry(report, c.sha, how or default_how(), checked_at) for c in report.change.commits}
    add_entries(git, entries, ref)
    return list(entries)


def record_skipped(git: Git, shas: Sequence[str], how: str, reason: str, ref: str = DEFAULT_REF) -> None:
    """Add a skipped entry (``how``: the check that did not run; ``reason``: why) to each commit's note."""
    checked_at = _now()
    add_entries(git, {sha: skipped_entry(how, reason, checked_at) for sha in shas}, ref)


def try_write_notes(git: Git, report: Report, ref: str, how: str | None = None) -> str | None:
    """Write the notes of ``report``; return a warning instead of failing (a note is a record, not a verdict)."""
    try:
        write_notes(git, report, ref, how)
    except GitError as error:
        return f"could not write the git notes under {ref}: {error}"
    return None


# -- reading ---------------------------------------------------------------------------------------------


def read_notes(git: Git, ref: str = DEFAULT_REF) -> dict[str, dict[str, Any]]:
    """Every note under ``ref``, by commit sha, as stored. A note that is not a JSON object comes back as
    ``{"format": None, "invalid": "<why>", "text": "<the note>"}``: check ``format`` before reading fields
    (or use :func:`latest_check`)."""
    notes: dict[str, dict[str, Any]] = {}
    for sha, text in git.read_notes(ref):
        body = parse_note(text)
        notes[sha] = {**body, "text": text} if "invalid" in body else body
    return notes


def parse_note(text: str) -> dict[str, Any]:
    """A note's JSON body; anything but a JSON object comes back as ``{"format": None, "invalid": why}``."""
    try:
        body = json.loads(text)
    except ValueError as error:
        return {"format": None, "invalid": f"not JSON: {error}"}
    return body if isinstance(body, dict) else {"format": None, "invalid": "not a JSON object"}


def latest_check(body: Mapping[str, Any]) -> dict[str, Any] | None:
    """The newest entry of a parsed note, with the note's ``commit`` and ``format``; None when it has none
    (an unreadable note, or one of a format this verifier does not know)."""
    checks = _raw_checks(body)
    if not checks:
        return None
    return {"format": body.get("format"), "commit": body.get("commit"), **checks[-1]}


@dataclass(frozen=True)
class CheckRecord:
    """One entry of a note, read defensively (wrong types become None or empty)."""

    how: str  # one of HOW, or "unknown" for a format-1 note
    skipped: bool
    verdict: str | None
    checked_at: str
    coverage_percent: float | None
    findings: tuple[Mapping[str, Any], ...]  # this commit's own
    range_findings: tuple[Mapping[str, Any], ...]  # the whole change's facts (a format-1 note: all its findings)
    waivers: tuple[Mapping[str, Any], ...]
    range_base: str | None = None
    range_head: str | None = None
    range_verdict: str | None = None


@dataclass(frozen=True)
class NoteRecord:
    """What a commit's note says: its checks, oldest first; ``problem`` when it cannot be read."""

    checks: tuple[CheckRecord, ...]
    problem: str | None = None  # why the note cannot be read
    dropped: int = 0  # older entries the size cap removed

    @property
    def newest(self) -> CheckRecord | None:
        return self.checks[-1] if self.checks else None


def read_record(note: Mapping[str, Any] | None) -> NoteRecord | None:
    """A parsed note read defensively; None when there is no note."""
    if note is None:
        return None
    if note.get("format") not in READABLE_FORMATS:
        why = note.get("invalid") or f"note format {note.get('format')!r} is not one of {READABLE_FORMATS}"
        return NoteRecord((), problem=str(why))
    checks = tuple(_check_record(entry) for entry in _raw_checks(note))
    if not checks:
        return NoteRecord((), problem="the note holds no check")
    dropped = note.get("dropped")
    return NoteRecord(checks, dropped=dropped if isinstance(dropped, int) else 0)


def _check_record(entry: Mapping[str, Any]) -> CheckRecord:
    coverage: Mapping[str, Any] = entry["coverage"] if isinstance(entry.get("coverage"), Mapping) else {}
    percent = coverage.get("percent")
    scope: Mapping[str, Any] = entry["range"] if isinstance(entry.get("range"), Mapping) else {}
    own = _mappings(entry.get("findings"))
    range_findings = _mappings(scope.get("findings"))
    if entry.get("format_1"):  # a format-1 note copied the whole change's findings onto every commit
        own, range_findings = (), own
    return CheckRecord(
        how=_text(entry.get("how")) or "unknown",
        skipped=entry.get("skipped") is True,
        verdict=_text(entry.get("verdict")),
        checked_at=_text(entry.get("checked_at")) or "",
        coverage_percent=percent if isinstance(percent, (int, float)) and not isinstance(percent, bool) else None,
        findings=own,
        range_findings=range_findings,
        waivers=_mappings(entry.get("waivers")),
        range_base=_text(scope.get("base")),
        range_head=_text(scope.get("head")),
        range_verdict=_text(scope.get("verdict")) or (_text(entry.get("verdict")) if entry.get("format_1") else None),
    )


def _mappings(value: Any) -> tuple[Mapping[str, Any], ...]:
    return tuple(v for v in value if isinstance(v, Mapping)) if isinstance(value, list) else ()


def _text(value: Any) -> str | None:
    return value if isinstance(value, str) else None


# -- staged verdicts, waiting for their commit ---------------------------------------------------------


def state_dir(git: Git) -> Path:
    """The gate's own folder under the (per-worktree) git dir: pending verdicts, the saved message."""
    return (git.repo / git.text(["rev-parse", "--git-path", "verifier"])).resolve()


def staged_tree(git: Git, index_file: str | None = None) -> str:
    """The tree the index would commit, computed on a copy so that the user's index is never rewritten."""
    import tempfile  # only here: the audit imports this module and its warm runs skip tempfile's imports

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
    entry = check_entry(report, INDEX, "commit-hook")
    target = folder / f"{tree}.json"
    target.write_text(json.dumps({"saved_at": time.time(), "base": report.change.base, "entry": entry}) + "\n")
    return target


def note_pending(git: Git, ref: str = DEFAULT_REF) -> str | None:
    """Add the staged verdict for HEAD's tree to HEAD's note; return HEAD's sha when one was written."""
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
        entry = saved.get("entry")
        if fresh and isinstance(entry, dict) and saved.get("base") == git.first_parent(head):
            scope = {**entry.get("range", {}), "base": saved.get("base"), "head": head}
            add_entries(git, {head: {**entry, "range": scope}}, ref)
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
