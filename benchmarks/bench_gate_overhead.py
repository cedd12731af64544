"""The gate's overhead on a real library's suite: `verifier check` of a one-function machine-written change
against a plain `coverage run --branch -m pytest` of the same tests in the same tree (the bar: at most 1.3x).

The library is a real open-source project installed from PyPI as an sdist (boltons by default; any sdist
that ships its tests works: `python bench_gate_overhead.py <name>==<version>`). Prints the ratio measured
side by side in one run. Needs the network for the download.
"""

from __future__ import annotations

import subprocess
import sys
import tarfile
import tempfile
from pathlib import Path

from timing import compare, run_command

from verifier.demo.scratch import ScratchRepo

DEFAULT_LIBRARY = "boltons==26.2.0"
CHANGE_TARGET = ("boltons/strutils.py", "def bytes2human(", "    # quill-assist: sizes are never negative\n")


def fetch_sdist(requirement: str, folder: Path) -> Path:
    """Download and unpack the sdist of ``requirement``; return the unpacked project folder."""
    subprocess.run(
        [
            sys.executable,
            "-m",
            "pip",
            "download",
            "-q",
            "--no-deps",
            "--no-binary",
            ":all:",
            "-d",
            str(folder),
            requirement,
        ],
        check=True,
    )
    archive = next(folder.glob("*.tar.gz"))
    with tarfile.open(archive) as sdist:
        sdist.extractall(folder, filter="data") if hasattr(tarfile, "data_filter") else sdist.extractall(folder)
    return next(p for p in folder.iterdir() if p.is_dir())


def machine_commit(repo: ScratchRepo, target: tuple[str, str, str]) -> None:
    """A small model-style change inside one function (a comment plus a statement at its top)."""
    path, anchor, comment = target
    source = (repo.path / path).read_text()
    head, sep, rest = source.partition(anchor)
    signature_end = rest.index(":\n") + 2
    body = rest[:signature_end] + comment + "    _checked = True\n" + rest[signature_end:]
    repo.write({path: head + sep + body})
    repo.git("add", "-A")
    repo.git("commit", "-q", "-m", "Tidy bytes2human\n\nModel-Written: quill-assist/2.3")


def main() -> None:
    requirement = sys.argv[1] if len(sys.argv) > 1 else DEFAULT_LIBRARY
    with tempfile.TemporaryDirectory(prefix="bench-gate-") as scratch:
        folder = Path(scratch)
        project = fetch_sdist(requirement, folder / "sdist")
        repo = ScratchRepo(project)
        repo.git("add", "-A")
        repo.git("commit", "-q", "-m", f"Import {requirement}")
        machine_commit(repo, CHANGE_TARGET)
        plain_tree = folder / "plain"
        repo.git("worktree", "add", "-q", "--detach", str(plain_tree), "HEAD")
        gate = [sys.executable, "-m", "verifier", "-C", str(repo.path), "check", "HEAD", "--quiet"]
        plain = [sys.executable, "-m", "coverage", "run", "--branch", "-m", "pytest", "-q", "-p", "no:cacheprovider"]
        outcome = subprocess.run(gate, capture_output=True, text=True)
        print(f"gate verdict on the change (exit {outcome.returncode}):\n{outcome.stdout[-800:]}")
        result = compare(
            "verifier check (sandbox, coverage, contexts)",
            run_command(gate),
            "coverage run -m pytest",
            run_command(plain, cwd=plain_tree),
            runs=3,
        )
    print(f"library: {requirement}")
    print(result.describe())
    print(f"bar: at most 1.3x -> {'met' if result.ratio <= 1.3 else 'NOT met'}")


if __name__ == "__main__":
    main()
