"""The static rules on a 5,000-line machine-written change, against ``ast.parse`` of the same files.

Issue 4 asks the static rules to take at most twice the time of parsing the changed Python files. The
change is real (a scratch repository, a machine commit of parcelkit-like modules and tests, one test
file edited); the rules run through ``apply_rules`` with their caches emptied and a fresh reader of
base files (nothing git answered in an earlier run is kept) before every run.
Prints medians and the ratio; run with ``python benchmarks/bench_static_rules.py``.
"""

from __future__ import annotations

import ast
import sys
import tempfile
from dataclasses import replace
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

from timing import compare

from verifier import astnames
from verifier.gitio import Git
from verifier.pipeline import _base_reader
from verifier.verdict.judge import apply_rules

MODULE = '''"""Tariffs for zone {n}."""

import json
import subprocess as sp
from pathlib import Path

RATES_{n} = {{"home": 4.5, "near": 6.0, "far": 9.5}}


def price_{n}(weight: float, zone: str = "home") -> float:
    if weight <= 0:
        raise ValueError("weight must be positive")
    table = json.loads(Path("tariffs.json").read_text()) if zone == "file" else RATES_{n}
    return round(table[zone] + 1.2 * weight, 2)


def archive_{n}(folder: str) -> None:
    sp.run(["tar", "czf", "out.tgz", folder], check=True)
'''
TEST = """import pytest

from parcelkit.zone_{n} import price_{n}


@pytest.mark.parametrize("weight, expected", [(1, 5.7), (2, 6.9)])
def test_price_{n}(weight, expected):
    assert price_{n}(weight) == expected


def test_rejects_{n}():
    with pytest.raises(ValueError, match="positive"):
        price_{n}(0)
"""


def build(root: Path):  # type: ignore[no-untyped-def]
    from conftest import machine
    from test_rules_support import context_for

    from verifier.demo.scratch import ScratchRepo

    repo = ScratchRepo(root / "repo")
    tests = {f"tests/test_zone_{n}.py": TEST.format(n=n) for n in range(100)}
    repo.commit("Start", {"parcelkit/__init__.py": "", **tests})
    files = {f"parcelkit/zone_{n}.py": MODULE.format(n=n) for n in range(300)}
    files |= {path: text.replace("(2, 6.9)", "(2, 6.9), (3, 8.1)") for path, text in tests.items()}
    sha = repo.commit(machine("Zones"), files)
    return context_for(repo, sha)


def main() -> None:
    with tempfile.TemporaryDirectory() as folder:
        context = build(Path(folder))
        sources = {p: t for p, t in context.head_sources.items() if p.endswith(".py")}
        print(
            f"{context.provenance.machine_line_count} machine-written lines in {len(sources)} Python files "
            f"(and {sum(1 for p in context.base_sources if p.endswith('.py'))} base versions)"
        )

        git = Git(Path(folder) / "repo")

        def rules() -> None:
            astnames.clear_caches()
            apply_rules("static", replace(context, read_base=_base_reader(git, context.change)))

        def parse() -> None:
            for path, text in sources.items():
                ast.parse(text, filename=path)

        print(compare("static rules", rules, "ast.parse", parse, runs=11).describe())


if __name__ == "__main__":
    main()
