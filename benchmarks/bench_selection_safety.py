"""Safety of test selection on real libraries: does the gate ever miss a failure the whole suite shows?

For each library (a real open-source project installed from PyPI as an sdist, tests included), the
sdist becomes the base commit, with a policy that turns selection on. Then, one at a time on top of
that base, model-style changes with an injected fault: a small edit inside a function (a comparison
flipped, an off-by-one, a boolean swapped) or at module level, committed with the Model-Written
trailer. For each one the script runs ``verifier check`` (observed selection; the base map is built once
and then cached) and, as the reference, plain ``pytest`` over the whole suite of the same tree, and
compares the failing tests. It prints, per fault and in total, the failures the gate missed (the bar:
zero) and the fraction of the suite the gate ran.

Usage: python benchmarks/bench_selection_safety.py [faults per library] [requirement ...]
Needs the network for the downloads (PyPI only). Not run by CI.
"""

from __future__ import annotations

import ast
import json
import random
import re
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

from bench_gate_overhead import fetch_sdist

from verifier.demo.scratch import ScratchRepo

LIBRARIES = ("toolz==1.0.0", "more-itertools==10.5.0")
POLICY = "selection:\n  run: observed\ncoverage:\n  threshold: 0\n"
AGENT = "quill-assist/2.3"
# (text in a line, replacement): the kinds of slip a model makes in a plausible-looking edit
MUTATIONS = (
    (" == ", " != "),
    (" < ", " <= "),
    (" > ", " >= "),
    (" + 1", " + 2"),
    (" - 1", " - 2"),
    (" and ", " or "),
    ("return True", "return False"),
    ("return False", "return True"),
    (" is None", " is not None"),
    (" not in ", " in "),
)
SEED = 6


@dataclass(frozen=True)
class Fault:
    path: str
    line: int
    old: str
    new: str
    where: str  # "function" or "module"


def library_sources(root: Path) -> list[Path]:
    """The library's own Python files: not tests, not packaging or documentation helpers."""
    skip = re.compile(r"(^|/)(tests?|docs?|doc|benchmarks?|examples?)/|(^|/)(setup|versioneer|conftest)\.py$")
    return [
        p
        for p in sorted(root.rglob("*.py"))
        if not skip.search(p.relative_to(root).as_posix()) and not p.name.startswith("test_")
    ]


def candidate_faults(root: Path) -> list[Fault]:
    faults = []
    for file in library_sources(root):
        text = file.read_text(encoding="utf-8", errors="replace")
        try:
            tree = ast.parse(text)
        except SyntaxError:
            continue
        body_lines = {
            line
            for node in ast.walk(tree)
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef))
            for line in range(node.body[0].lineno, (node.end_lineno or 0) + 1)
        }
        strings = {
            line
            for node in ast.walk(tree)
            if isinstance(node, ast.Constant) and isinstance(node.value, str)
            for line in range(node.lineno, (node.end_lineno or node.lineno) + 1)
        }  # docstrings, literals
        for number, row in enumerate(text.split("\n"), start=1):
            if row.lstrip().startswith("#") or number in strings:
                continue
            for old, new in MUTATIONS:
                if old in row:
                    where = "function" if number in body_lines else "module"
                    faults.append(
                        Fault(file.relative_to(root).as_posix(), number, row, row.replace(old, new, 1), where)
                    )
                    break
    return faults


def commit_fault(repo: ScratchRepo, base: str, fault: Fault) -> str:
    repo.git("checkout", "-q", "--detach", base)
    target = repo.path / fault.path
    rows = target.read_text(encoding="utf-8").split("\n")
    rows[fault.line - 1] = fault.new
    target.write_text("\n".join(rows), encoding="utf-8")
    repo.git("add", "-A")
    message = f"Tidy {fault.path}\n\nModel-Written: {AGENT}\n"
    repo.git("commit", "-q", "-F", "-", input=message.encode())
    return repo.head()


def gate_failures(repo: ScratchRepo, sha: str, out: Path) -> tuple[set[str], int, str]:
    report_file = out / f"gate-{sha[:12]}.json"
    done = subprocess.run(
        [
            sys.executable,
            "-m",
            "verifier",
            "-C",
            str(repo.path),
            "check",
            sha,
            "--quiet",
            "--format",
            "json",
            "--output",
            str(report_file),
        ],
        capture_output=True,
        text=True,
    )
    if not report_file.exists():
        raise SystemExit(f"the gate wrote no report (exit {done.returncode}): {done.stderr[-2000:]}")
    report = json.loads(report_file.read_text())
    tests = report.get("tests", {})
    map_status = (report.get("selection") or {}).get("map", "?")
    return set(tests.get("failed_ids", [])), int(tests.get("run", 0)), map_status


def suite_failures(repo: ScratchRepo, sha: str, out: Path) -> tuple[set[str], int]:
    """The reference: plain pytest over the whole suite of a fresh export of ``sha``."""
    tree = out / f"tree-{sha[:12]}"
    tree.mkdir()
    archive = subprocess.run(["git", "archive", sha], cwd=repo.path, capture_output=True, check=True).stdout
    subprocess.run(["tar", "-x", "-C", str(tree)], input=archive, check=True)
    junit = out / f"junit-{sha[:12]}.xml"
    subprocess.run(
        [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "--rootdir=.", f"--junitxml={junit}", "-rfE"],
        cwd=tree,
        capture_output=True,
        text=True,
        env={"PATH": "/usr/bin:/bin", "PYTHONPATH": ".:src", "PYTHONHASHSEED": "0"},
    )
    return _junit_failures(junit, tree)


def _junit_failures(junit: Path, tree: Path) -> tuple[set[str], int]:
    import xml.etree.ElementTree as ElementTree

    failed, total = set(), 0
    for case in ElementTree.parse(junit).iter("testcase"):
        total += 1
        if case.find("failure") is not None or case.find("error") is not None:
            failed.add(_node_id(case.get("classname", ""), case.get("name", ""), tree))
    return failed, total


def _node_id(classname: str, name: str, tree: Path) -> str:
    """JUnit's dotted classname back to pytest's node id: the longest prefix that is a file of the tree."""
    parts = classname.split(".")
    for cut in range(len(parts), 0, -1):
        path = "/".join(parts[:cut]) + ".py"
        if (tree / path).is_file():
            return "::".join([path, *parts[cut:], name])
    return f"{classname}::{name}"


def main() -> None:
    per_library = int(sys.argv[1]) if len(sys.argv) > 1 else 8
    libraries = tuple(sys.argv[2:]) or LIBRARIES
    rng = random.Random(SEED)
    total_missed = total_failures = 0
    fractions = []
    with tempfile.TemporaryDirectory(prefix="bench-safety-") as scratch:
        for requirement in libraries:
            folder = Path(scratch) / requirement.replace("=", "_")
            project = fetch_sdist(requirement, folder / "sdist")
            (project / "verifier.yaml").write_text(POLICY)
            repo = ScratchRepo(project)
            repo.git("add", "-A")
            repo.git("commit", "-q", "-m", f"Import {requirement}")
            base = repo.head()
            faults = candidate_faults(project)
            chosen = rng.sample(faults, min(per_library, len(faults)))
            print(f"\n{requirement}: {len(faults)} candidate faults, {len(chosen)} injected")
            for fault in chosen:
                sha = commit_fault(repo, base, fault)
                gate, ran, map_status = gate_failures(repo, sha, folder)
                full, suite_size = suite_failures(repo, sha, folder)
                missed = full - gate
                total_missed += len(missed)
                total_failures += len(full)
                fractions.append(ran / suite_size if suite_size else 0.0)
                print(f"  {fault.path}:{fault.line} ({fault.where}) {fault.old.strip()!r} -> {fault.new.strip()!r}")
                print(
                    f"    suite: {len(full)} failing of {suite_size}; gate: ran {ran} ({ran / suite_size:.1%}), "
                    f"{len(gate)} failing, map {map_status}; missed {len(missed)}"
                )
                for test in sorted(missed):
                    print(f"    MISSED {test}")
    print(
        f"\ntotal: {total_failures} failures in the whole suites, missed by the gate: {total_missed} (bar: 0) -> "
        f"{'met' if total_missed == 0 else 'NOT met'}"
    )
    if fractions:
        print(
            f"fraction of the suite the gate ran: mean {sum(fractions) / len(fractions):.1%}, "
            f"min {min(fractions):.1%}, max {max(fractions):.1%}"
        )


if __name__ == "__main__":
    main()
