"""Benchmark: what the test census and the base test files' run at head add to a check, measured side by
side in one run: ``verifier check`` of a machine commit that edits a code file and its test file, on a small
invented library (parcelkit: 3 code modules, 4 test files, 40 tests), with ``tests.lost`` and
``tests.rewritten`` on (A) and off (B). The census cache is emptied before every run of A (as on the first
check of a base revision; a second check of the same base reads the census from the cache). Mode ``all``
(no who-tests-what map: the census needs its own run at base) and ``observed`` (the census read from the map).

Run: python benchmarks/bench_census.py [--runs N]
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
from functools import partial
from pathlib import Path

from timing import compare

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from verifier.demo.scratch import ScratchRepo  # noqa: E402

MACHINE = "Handle parcels of zero weight\n\nWritten by the assistant.\n\nModel-Written: quill-assist/2.3\n"
OFF = "  tests.lost: ignore\n  tests.rewritten: ignore\n"


def library() -> dict[str, str]:
    files = {"parcelkit/__init__.py": ""}
    for number in range(3):
        files[f"parcelkit/part{number}.py"] = f"def value(weight):\n    return weight * {number + 2}\n"
    for number in range(4):
        module = f"part{number % 3}"
        factor = number % 3 + 2
        tests = "".join(f"\n\ndef test_value_{n}():\n    assert value({n}) == {n * factor}\n" for n in range(10))
        files[f"tests/test_{module}_{number}.py"] = f"from parcelkit.{module} import value\n{tests}"
    return files


def make_repo(folder: Path, mode: str, rules_on: bool) -> tuple[ScratchRepo, str]:
    repo = ScratchRepo(folder)
    policy = f"version: 1\nselection:\n  run: {mode}\nrules:\n  tests.mutant-survived: ignore\n"
    files = library()
    repo.commit("Start parcelkit", {"verifier.yaml": policy + ("" if rules_on else OFF), **files})
    edited = files["parcelkit/part0.py"].replace("    return", "    if weight == 0:\n        return 0\n    return")
    test = files["tests/test_part0_0.py"] + "\n\ndef test_value_of_nothing():\n    assert value(0) == 0\n"
    return repo, repo.commit(MACHINE, {"parcelkit/part0.py": edited, "tests/test_part0_0.py": test})


def check(repo: ScratchRepo, sha: str, empty_cache: bool) -> int:
    if empty_cache:
        shutil.rmtree(repo.path / ".git" / "verifier" / "cache" / "census", ignore_errors=True)
    command = [sys.executable, "-m", "verifier", "-C", str(repo.path), "check", sha, "--sandbox", "namespace"]
    environment = {**os.environ, "PYTHONPATH": str(ROOT)}
    done = subprocess.run(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=environment)
    return done.returncode


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=5)
    runs = parser.parse_args().runs
    with tempfile.TemporaryDirectory() as folder:
        for mode in ("all", "observed"):
            repo_a, sha_a = make_repo(Path(folder) / f"{mode}-on", mode, True)
            repo_b, sha_b = make_repo(Path(folder) / f"{mode}-off", mode, False)
            with_census, without = partial(check, repo_a, sha_a, True), partial(check, repo_b, sha_b, False)
            print(f"{mode}: exit codes {with_census()} (with) and {without()} (without); both must be 0")
            result = compare(f"census and base tests at head ({mode})", with_census, f"without ({mode})", without, runs)
            print(result.describe())


if __name__ == "__main__":
    main()
