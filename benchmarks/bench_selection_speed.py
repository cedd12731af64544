"""Speed of the gate with test selection on a real library's suite, measured side by side in one run.

The library is a real open-source project installed from PyPI as an sdist (more-itertools by
default: 664 tests and 2332 subtests, 15-20 s under coverage on the 2-core machine it was measured on).
Its sdist is the base commit, with a policy that turns selection on; a one-function model-style change
sits on top. Three things are timed in turn, several rounds (A B C A B C ...):

* full:  ``coverage run --branch -m pytest`` of the whole suite on a copy of the head tree;
* cold:  ``verifier check`` with no cached map (it builds the base map, then runs the selection);
* warm:  ``verifier check`` with the base map cached (the common case in CI and in a commit hook).

Bars: warm at most 20% of full; cold at most 1.3x full. Usage:
``python benchmarks/bench_selection_speed.py [rounds] [requirement path 'def name(']``.
Needs the network for the download (PyPI only). Not run by CI.
"""

from __future__ import annotations

import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from bench_gate_overhead import fetch_sdist

from verifier.demo.scratch import ScratchRepo

DEFAULT = ("more-itertools==10.5.0", "more_itertools/more.py", "def chunked(")
POLICY = 'selection:\n  run: observed\ncoverage:\n  threshold: 0\ntests:\n  python_path: [".", "src"]\n'


def one_function_change(repo: ScratchRepo, path: str, anchor: str) -> None:
    """A model-style edit inside one function: a comment and a statement at the top of its body."""
    source = (repo.path / path).read_text()
    head, sep, rest = source.partition(anchor)
    body_start = rest.index(":\n") + 2
    docstring_end = _after_docstring(rest, body_start)
    indent = "    "
    edited = rest[:docstring_end] + f"{indent}# quill-assist: validated by the caller\n{indent}_checked = True\n"
    repo.write({path: head + sep + edited + rest[docstring_end:]})
    repo.git("add", "-A")
    repo.git("commit", "-q", "-m", f"Tidy {path}\n\nModel-Written: quill-assist/2.3")


def _after_docstring(rest: str, body_start: int) -> int:
    """Where the function's body code starts: after its docstring, when it has one."""
    stripped = rest[body_start:].lstrip()
    for quote in ('"""', "'''"):
        if stripped.startswith(quote):
            opening = rest.index(quote, body_start)
            closing = rest.index(quote, opening + 3) + 3
            return rest.index("\n", closing) + 1
    return body_start


def timed(argv: list[str], cwd: Path | None = None) -> tuple[float, str]:
    start = time.perf_counter()
    done = subprocess.run(argv, cwd=cwd, capture_output=True, text=True)
    return time.perf_counter() - start, done.stdout[-600:]


def main() -> None:
    rounds = int(sys.argv[1]) if len(sys.argv) > 1 else 3
    requirement, path, anchor = tuple(sys.argv[2:5]) if len(sys.argv) > 4 else DEFAULT
    with tempfile.TemporaryDirectory(prefix="bench-speed-") as scratch:
        folder = Path(scratch)
        project = fetch_sdist(requirement, folder / "sdist")
        (project / "verifier.yaml").write_text(POLICY)
        repo = ScratchRepo(project)
        repo.git("add", "-A")
        repo.git("commit", "-q", "-m", f"Import {requirement}")
        one_function_change(repo, path, anchor)
        plain_tree = folder / "plain"
        repo.git("worktree", "add", "-q", "--detach", str(plain_tree), "HEAD")
        cache = repo.path / ".git" / "verifier" / "cache"
        gate = [sys.executable, "-m", "verifier", "-C", str(repo.path), "check", "HEAD"]
        full = [sys.executable, "-m", "coverage", "run", "--branch", "-m", "pytest", "-q", "-p", "no:cacheprovider"]
        times: dict[str, list[float]] = {"full": [], "cold": [], "warm": []}
        last = ""
        for _round in range(rounds):
            times["full"].append(timed(full, plain_tree)[0])
            shutil.rmtree(cache, ignore_errors=True)
            times["cold"].append(timed(gate)[0])
            seconds, last = timed(gate)
            times["warm"].append(seconds)
    medians = {name: statistics.median(values) for name, values in times.items()}
    print(f"library: {requirement}; change: one function ({path}, {anchor.strip()})")
    print(f"last warm report:\n{last}")
    for name, values in times.items():
        print(f"{name:>5}: median {medians[name]:.2f}s of {', '.join(f'{v:.2f}' for v in values)}")
    warm, cold = medians["warm"] / medians["full"], medians["cold"] / medians["full"]
    print(f"warm / full = {warm:.2f} (bar: at most 0.20) -> {'met' if warm <= 0.2 else 'NOT met'}")
    print(f"cold / full = {cold:.2f} (bar: at most 1.30) -> {'met' if cold <= 1.3 else 'NOT met'}")


if __name__ == "__main__":
    main()
