"""The mutation stage's cost on a real library: `verifier check` of a one-function machine-written change
with the mutation stage, and without it, each against a plain `coverage run --branch -m pytest` of the
whole suite in the same tree (the bar: at most 1.5x with mutants), measured side by side in one run. Then
the cost of each mutant against the measured run time of the tests it runs (the bar: close to 1x, no
interpreter start per mutant).

The library is a real open-source project installed from PyPI as an sdist (boltons by default); the
change rewrites the body of one function (boltons.strutils.bytes2human) in another style, keeping what
it does. The mutant cache is emptied before every measured gate run, so every run tries every mutant.
Last, a sample of the mutants is applied to a checkout and the whole suite run on it under pytest: the
stage's outcome (from the tests that executed the line only) must agree every time.
Needs the network for the download.
"""

from __future__ import annotations

import shutil
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

from bench_gate_overhead import fetch_sdist
from timing import compare, run_command

from verifier.demo.scratch import ScratchRepo
from verifier.models import Mutant

DEFAULT_LIBRARY = "boltons==26.2.0"
TARGET = "boltons/strutils.py"
BEFORE = """\
    abs_bytes = abs(nbytes)
    for (size, symbol), (next_size, next_symbol) in _SIZE_RANGES:
        if abs_bytes < next_size:
            break
    hnbytes = float(nbytes) / size
    return '{hnbytes:.{ndigits}f}{symbol}'.format(hnbytes=hnbytes,
                                                  ndigits=ndigits,
                                                  symbol=symbol)
"""
AFTER = """\
    magnitude = abs(nbytes)
    for (size, symbol), (next_size, _next_symbol) in _SIZE_RANGES:
        if magnitude < next_size:
            break
    scaled = float(nbytes) / size
    return f"{scaled:.{ndigits}f}{symbol}"
"""
POLICY_WITHOUT = "version: 1\nrules:\n  tests.mutant-survived: ignore\n"


def make_repo(project: Path, folder: Path, policy: str | None) -> ScratchRepo:
    """A repository of the library (with ``policy`` as its verifier.yaml at base) and the machine commit."""
    shutil.copytree(project, folder)
    repo = ScratchRepo(folder)
    if policy:
        repo.write({"verifier.yaml": policy})
    repo.git("add", "-A")
    repo.git("commit", "-q", "-m", "Import the library")
    source = (folder / TARGET).read_text()
    assert BEFORE in source, "the benchmark's target function changed upstream"
    repo.commit("Tidy bytes2human\n\nModel-Written: quill-assist/2.3\n", {TARGET: source.replace(BEFORE, AFTER)})
    return repo


def gate(repo: ScratchRepo):  # type: ignore[no-untyped-def]
    """A gate run with an empty mutant cache (a first check of this commit)."""
    check = run_command([sys.executable, "-m", "verifier", "-C", str(repo.path), "check", "HEAD", "--quiet"])

    def action() -> object:
        shutil.rmtree(repo.path / ".git" / "verifier" / "cache" / "mutants", ignore_errors=True)
        return check()

    return action


def per_mutant_cost(repo: ScratchRepo, sample: int, scratch: Path) -> None:
    """Each mutant's time in the sandbox against the run time of its tests measured by the normal run; then,
    for ``sample`` mutants, the stage's outcome against pytest's own run of the whole suite on the mutant."""
    from verifier.change.stage import RevisionSpec
    from verifier.pipeline import Options, verify

    shutil.rmtree(repo.path / ".git" / "verifier" / "cache" / "mutants", ignore_errors=True)
    report = verify(repo.path, RevisionSpec(text="HEAD"), Options())
    assert report.run is not None and report.mutation is not None
    durations = {test.node_id: test.duration for test in report.run.tests}
    rows = {"fork": [], "fresh": []}  # type: dict[str, list[tuple[float, float]]]
    for outcome in report.mutation.outcomes:
        if outcome.status == "not-run" or outcome.cached:
            continue
        tests_time = sum(durations.get(test, 0.0) for test in outcome.tests)
        rows["fork" if outcome.mutant.scope else "fresh"].append((outcome.seconds, tests_time))
    counts = {status: report.mutation.count(status) for status in ("killed", "survived", "timeout", "crashed")}
    print(f"mutants: {len(report.mutation.outcomes)} {counts}; stage wall {report.mutation.wall_seconds:.2f}s")
    for how, pairs in rows.items():
        if not pairs:
            continue
        mutant_s = statistics.median(p[0] for p in pairs)
        tests_s = statistics.median(p[1] for p in pairs)
        extra = statistics.median(p[0] - p[1] for p in pairs)
        ratio = statistics.median(p[0] / p[1] for p in pairs) if all(p[1] > 0 for p in pairs) else float("nan")
        print(
            f"  {how}: {len(pairs)} mutants, median per mutant {mutant_s * 1000:.1f} ms, median run time of its "
            f"tests {tests_s * 1000:.1f} ms, median cost beyond the tests {extra * 1000:.1f} ms, "
            f"median ratio per mutant {ratio:.2f}x (bar: close to 1x)"
        )
    tried = [o for o in report.mutation.outcomes if o.status not in ("not-run", "error")][:sample]
    agree = sum(1 for o in tried if whole_suite_kills(repo, o.mutant, scratch) == o.counts_as_killed)
    print(f"selection agreement: {agree} of {len(tried)} mutants judged as the whole suite judges them (bar: all)")


def whole_suite_kills(repo: ScratchRepo, mutant: Mutant, scratch: Path) -> bool:
    """Apply ``mutant`` by plain text replacement to a fresh checkout and run every test under pytest."""
    tree = scratch / f"whole-{mutant.line}-{abs(hash(mutant.mutated))}"
    repo.git("worktree", "add", "-q", "--detach", str(tree), "HEAD")
    target = tree / mutant.path
    rows = target.read_text().split("\n")
    rows[mutant.line - 1 : mutant.end_line] = [mutant.mutated]
    target.write_text("\n".join(rows))
    try:
        done = subprocess.run(
            [sys.executable, "-m", "pytest", "-q", "-x", "-p", "no:cacheprovider"],
            cwd=tree,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
            timeout=300,
        )
    except subprocess.TimeoutExpired:
        return True  # an endless loop: the stage counts its timeout as a kill too
    return done.returncode != 0


def main() -> None:
    requirement = sys.argv[1] if len(sys.argv) > 1 else DEFAULT_LIBRARY
    with tempfile.TemporaryDirectory(prefix="bench-mutation-") as scratch:
        folder = Path(scratch)
        project = fetch_sdist(requirement, folder / "sdist")
        with_mutants = make_repo(project, folder / "with", None)
        without = make_repo(project, folder / "without", POLICY_WITHOUT)
        plain_tree = folder / "plain"
        with_mutants.git("worktree", "add", "-q", "--detach", str(plain_tree), "HEAD")
        plain = [sys.executable, "-m", "coverage", "run", "--branch", "-m", "pytest", "-q", "-p", "no:cacheprovider"]
        outcome = subprocess.run(
            [sys.executable, "-m", "verifier", "-C", str(with_mutants.path), "check", "HEAD"],
            capture_output=True,
            text=True,
        )
        print(f"gate verdict on the change (exit {outcome.returncode}):\n{outcome.stdout[-1500:]}")
        plain_action = run_command(plain, cwd=plain_tree)
        measured = compare("gate with mutants", gate(with_mutants), "coverage run -m pytest", plain_action, runs=3)
        baseline = compare("gate without mutants", gate(without), "coverage run -m pytest", plain_action, runs=3)
        print(f"library: {requirement}")
        print(measured.describe())
        print(baseline.describe())
        print(f"bar: at most 1.5x with mutants -> {'met' if measured.ratio <= 1.5 else 'NOT met'}")
        per_mutant_cost(with_mutants, sample=8, scratch=folder)


if __name__ == "__main__":
    main()
