"""The sealed harness's overhead: `verifier check` against a plain `coverage run --branch -m pytest` of the
same tests in the same tree, for this checkout and (optionally) another one, side by side in one run.

The suite is generated (no network needed): a package of ``MODULES`` modules with ``TESTS`` tests each,
and a one-function machine-written change. Usage: ``python bench_harness_overhead.py [<other checkout>]``,
for example the main branch's worktree, to print the ratio before and after a change of the harness.
"""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
from pathlib import Path

from timing import compare, run_command

from verifier.demo.scratch import ScratchRepo

HERE = Path(__file__).resolve().parent.parent
MODULES, TESTS = 20, 15


def suite() -> dict[str, str]:
    files = {"shop/__init__.py": ""}
    for m in range(MODULES):
        files[f"shop/part{m}.py"] = "".join(
            f"def f{t}(x):\n    if x > {t}:\n        return x - {t}\n    return x + {t}\n\n\n" for t in range(TESTS)
        )
        files[f"tests/test_part{m}.py"] = f"from shop.part{m} import *\n\n\n" + "".join(
            f"def test_f{t}():\n    assert f{t}({t + 1}) == 1 and f{t}(0) == {t}\n\n\n" for t in range(TESTS)
        )
    return files


def gate_command(repo: Path, checkout: Path) -> tuple[list[str], dict[str, str]]:
    argv = [sys.executable, "-m", "verifier", "-C", str(repo), "check", "HEAD", "--quiet", "--sandbox", "namespace"]
    return argv, {**os.environ, "PYTHONPATH": str(checkout)}


def main() -> None:
    checkouts = {
        "this checkout": HERE,
        **({"other checkout": Path(sys.argv[1]).resolve()} if len(sys.argv) > 1 else {}),
    }
    with tempfile.TemporaryDirectory(prefix="bench-harness-") as scratch:
        repo = ScratchRepo(Path(scratch) / "repo")
        repo.commit("Start the shop", suite())
        changed = suite()["shop/part0.py"].replace("    return x + 0\n", "    return x + 0  # unchanged\n", 1)
        repo.commit("Tidy f0\n\nModel-Written: quill-assist/2.3", {"shop/part0.py": changed})
        plain = [sys.executable, "-m", "coverage", "run", "--branch", "-m", "pytest", "-q", "-p", "no:cacheprovider"]
        for name, checkout in checkouts.items():
            argv, env = gate_command(repo.path, checkout)
            outcome = subprocess.run(argv, capture_output=True, text=True, env=env)
            print(f"{name} ({checkout}): gate exit {outcome.returncode}")
            result = compare(
                f"verifier check, {name}",
                run_command(argv, env=env),
                "coverage run -m pytest",
                run_command(plain, cwd=repo.path),
                runs=3,
            )
            print(result.describe())
        if len(checkouts) == 2:
            (name_a, a), (name_b, b) = checkouts.items()
            (argv_a, env_a), (argv_b, env_b) = gate_command(repo.path, a), gate_command(repo.path, b)
            both = compare(
                f"verifier check, {name_a}",
                run_command(argv_a, env=env_a),
                f"verifier check, {name_b}",
                run_command(argv_b, env=env_b),
                runs=3,
            )
            print(both.describe())


if __name__ == "__main__":
    main()
