"""Benchmark: ``verifier audit`` of a generated 10,000-commit history against ``git log`` printing the same
commits with their messages and notes, measured side by side in one run (runs interleaved, medians).

The history (made with ``git fast-import``): parcelkit modules edited by people and by quill-assist (about
40% machine commits, 80% of those with a note), lines inserted and rewritten, side branches merged.
Printed: the first audit (no cache: every patch read and replayed), the audit again (the cache in the git
dir holds the span's commits and the replay, the policy, and the notes by their ref's tip), the audit with
only the notes read again (as after a ``--recheck`` or a new note), the audit of a span not seen before
with its patches cached (as next week's audit: ``git log`` and the replay run, no ``diff-tree``), and the
whole command line again (interpreter start and JSON output included; the package is byte-compiled
first, as an installed one is, so that a ``PYTHONDONTWRITEBYTECODE`` environment does not measure the
compiler).

Run: python benchmarks/bench_audit.py [--commits N]
"""

from __future__ import annotations

import argparse
import json
import random
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from verifier.audit.build import AuditRequest, run_audit  # noqa: E402

START = 1_704_067_200  # 2024-01-01T00:00:00Z
STEP = 600  # a commit every ten minutes
PERSON = b"Ada Okafor <ada.okafor@quillfeather.example>"
BASELINE_FORMAT = "%H%x1f%P%x1f%an <%ae>%x1f%cn <%ce>%x1f%ct%x1f%B%x1f%N"


def _data(text: str) -> bytes:
    raw = text.encode()
    return b"data %d\n%s\n" % (len(raw), raw)


def _message(number: int, machine: bool) -> str:
    body = f"Change {number} to parcelkit\n\nRoutine work on the rates and zones.\n"
    return body + ("\nModel-Written: quill-assist/2.3\n" if machine else "")


def _edit(rnd: random.Random, lines: list[str], number: int) -> None:
    if len(lines) > 8 and rnd.random() < 0.3:
        start = rnd.randrange(1, len(lines) - 3)
        lines[start : start + rnd.randint(1, 3)] = [f"rewritten_{number} = {number}\n"]
    for extra in range(rnd.randint(1, 6)):
        lines.insert(rnd.randint(1, len(lines)), f"value_{number}_{extra} = {number * extra}\n")


def _commit(mark: int, branch: bytes, when: int, message: str, parents: list[int], files: dict[str, str]) -> bytes:
    out = b"commit refs/heads/%s\nmark :%d\n" % (branch, mark)
    out += b"author %s %d +0000\ncommitter %s %d +0000\n" % (PERSON, when, PERSON, when) + _data(message)
    if parents:
        out += b"from :%d\n" % parents[0] + b"".join(b"merge :%d\n" % p for p in parents[1:])
    return out + b"".join(b"M 100644 inline %s\n" % path.encode() + _data(text) for path, text in files.items())


def generate(path: Path, commits: int, seed: int = 7) -> None:
    """Write the history with git fast-import (one stream: commits, side branches, merges, then the notes)."""
    rnd = random.Random(seed)
    subprocess.run(["git", "init", "-q", "-b", "main", str(path)], check=True)
    modules = {f"parcelkit/mod{i:03d}.py": [f"# parcelkit module {i}\n"] for i in range(300)}
    stream, notes = bytearray(), []
    main_tip = 0
    for number in range(1, commits + 1):
        when = START + number * STEP
        machine = rnd.random() < 0.4
        if number % 100 == 50 and main_tip:  # a side branch of one commit, merged by the next commit
            side = f"side/feature{number}.py"
            text = "".join(f"feature_{number}_{k} = {k}\n" for k in range(4))
            stream += _commit(number, b"side", when, _message(number, machine), [main_tip], {side: text})
            stream += b"reset refs/heads/side\n"
            pending = (number, side, text)
        elif number % 100 == 51 and main_tip:
            merged, side, text = pending
            stream += _commit(number, b"main", when, f"Merge feature {merged}\n", [main_tip, merged], {side: text})
            main_tip = number
            machine = False
        else:
            module = rnd.choice(list(modules))
            _edit(rnd, modules[module], number)
            stream += _commit(
                number,
                b"main",
                when,
                _message(number, machine),
                [main_tip] if main_tip else [],
                {module: "".join(modules[module])},
            )
            main_tip = number
        if machine and rnd.random() < 0.8:
            notes.append((number, rnd.choice(["pass", "pass", "pass", "warn", "block"])))
    stream += b"commit refs/notes/verifier\ncommitter %s %d +0000\n" % (PERSON, START + commits * STEP + 60)
    stream += _data("Notes of the gate")
    for mark, verdict in notes:
        body = {
            "format": 1,
            "tool": "verifier",
            "verdict": verdict,
            "agent": "quill-assist/2.3",
            "coverage": {"executable": 4, "covered": 4, "percent": 100.0},
            "findings": [],
            "waivers": [],
        }
        stream += b"N inline :%d\n" % mark + _data(json.dumps(body))
    subprocess.run(["git", "fast-import", "--quiet"], cwd=path, input=bytes(stream), check=True)


def _seconds(action) -> float:  # type: ignore[no-untyped-def]
    started = time.perf_counter()
    action()
    return time.perf_counter() - started


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--commits", type=int, default=10_000)
    parser.add_argument("--rounds", type=int, default=5)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="bench-audit-") as scratch:
        repo = Path(scratch) / "history"
        print(f"generating {args.commits} commits ...", file=sys.stderr)
        generate(repo, args.commits)
        since = time.strftime("%Y-%m-%d", time.gmtime(START))
        until = time.strftime("%Y-%m-%d", time.gmtime(START + (args.commits + 1) * STEP))
        request = AuditRequest(since=since, until=until, weeks=0)
        log = ["git", "-C", str(repo), "log", "--notes=verifier", f"--format={BASELINE_FORMAT}", "main"]
        cli = [
            sys.executable,
            "-m",
            "verifier",
            "-C",
            str(repo),
            "audit",
            "--since",
            since,
            "--until",
            until,
            "--weeks",
            "0",
            "--format",
            "json",
            "--output",
            str(Path(scratch) / "audit.json"),
        ]

        def baseline() -> None:
            subprocess.run(log, stdout=subprocess.DEVNULL, check=True)

        def command_line() -> None:
            subprocess.run(cli, check=True, stderr=subprocess.DEVNULL, cwd=ROOT)

        def notes_again() -> None:
            for cached in (repo / ".git" / "verifier" / "cache" / "audit").glob("notes-*"):
                cached.unlink()
            run_audit(repo, request)

        def new_span() -> None:
            for cached in (repo / ".git" / "verifier" / "cache" / "audit").glob("span-*"):
                cached.unlink()
            run_audit(repo, request)

        subprocess.run([sys.executable, "-m", "compileall", "-q", str(ROOT / "verifier")], check=True)
        baseline()  # warm git's own caches (pack files in the page cache) before measuring anything
        first = _seconds(lambda: run_audit(repo, request))
        audit = run_audit(repo, request)
        git_times, audit_times, notes_times, span_times, cli_times = [], [], [], [], []
        for _ in range(args.rounds):
            git_times.append(_seconds(baseline))
            audit_times.append(_seconds(lambda: run_audit(repo, request)))
            notes_times.append(_seconds(notes_again))
            span_times.append(_seconds(new_span))
            cli_times.append(_seconds(command_line))
        git_log, warm, notes, span, whole = (
            statistics.median(t) for t in (git_times, audit_times, notes_times, span_times, cli_times)
        )
        w = audit.window
        print(
            f"history: {w.commits} commits, {w.machine_commits} machine-written, {w.machine_lines_added} machine "
            f"lines ({w.machine_lines_alive} alive), {w.unverified} unverified, {w.blocked_merged} blocked-merged"
        )
        print(f"git log with messages and notes: {git_log * 1000:.0f} ms (median of {args.rounds})")
        print(f"first audit, no cache:           {first * 1000:.0f} ms  ratio {first / git_log:.2f}x")
        print(f"audit again (cache):             {warm * 1000:.0f} ms  ratio {warm / git_log:.2f}x  (bar: 2x)")
        print(f"audit, notes read again:         {notes * 1000:.0f} ms  ratio {notes / git_log:.2f}x")
        print(f"new span, patches cached:        {span * 1000:.0f} ms  ratio {span / git_log:.2f}x")
        print(f"command line again (cache):      {whole * 1000:.0f} ms  ratio {whole / git_log:.2f}x")
    return 0


if __name__ == "__main__":
    sys.exit(main())
