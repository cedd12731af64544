"""Updating the who-tests-what map when the base moves a few commits: the updated map must equal the map a
build from scratch gives (coverage.py's own records of a whole-suite run at the new base), test by test."""

from __future__ import annotations

import json
from pathlib import Path

from conftest import machine, report_of, run_check
from test_selection_default import DESCRIBE, HIDDEN_TEST, LIBRARY, PRICE, RATES, REMOTE

from verifier.demo.scratch import ScratchRepo
from verifier.models import FileChange
from verifier.selection.update import line_numbering


def test_line_numbering_follows_the_lines_a_diff_leaves_alone():
    # old: a b c d e f   new: a X c d Y Z e f   (b removed; X added; Y, Z added)
    changed = FileChange("m.py", "m.py", "modified", added_lines=(2, 5, 6), removed_lines=(2,))
    renumber = line_numbering(changed)
    assert [renumber(line) for line in range(1, 7)] == [1, None, 3, 4, 7, 8]
    assert renumber(100) == 102  # past the last change every line moves by the same amount
    assert line_numbering(FileChange("b.py", "b.py", "modified", binary=True))(1) is None


def test_lines_before_a_pure_insertion_keep_their_numbers():
    renumber = line_numbering(FileChange("m.py", "m.py", "modified", added_lines=(4, 5)))
    assert [renumber(line) for line in (1, 2, 3, 4, 5)] == [1, 2, 3, 6, 7]


def maps(repo: ScratchRepo) -> list[Path]:
    return sorted((repo.path / ".git" / "verifier" / "cache" / "impact").glob("*.json"))


def records_of(path: Path) -> dict:
    """A map file's per-test records: path -> line -> the tests that ran it (import time left out)."""
    data = json.loads(path.read_text())
    labels = data["contexts"]
    records = {
        file: {line: sorted(labels[i] for i in found if labels[i]) for line, found in lines.items()}
        for file, lines in data["lines"].items()
    }
    return {
        "outcomes": data["outcomes"],
        "lines": {file: {line: tests for line, tests in lines.items() if tests} for file, lines in records.items()},
    }


def test_a_map_updated_after_a_few_base_commits_equals_a_fresh_build(repo):
    repo.commit("parcelkit", LIBRARY)
    repo.commit(machine("Zones as a tuple"), {"src/parcelkit/rates.py": RATES.replace('== "remote"', 'in ("remote",)')})
    first = run_check(repo, "HEAD")
    assert first.code == 0 and report_of(first)["selection"]["map"] == "built", first.stdout + first.stderr

    # The base moves on: a person changes price() (lines shift below it), adds a test file, changes the hidden module.
    moved = RATES.replace(
        "        return weight * self.rate\n", "        total = weight * self.rate\n        return total\n"
    ).replace('== "remote"', 'in ("remote",)')
    repo.commit("Price in two steps", {"src/parcelkit/rates.py": moved})
    repo.commit(
        "A test of a heavier tariff",
        {
            "tests/test_heavier.py": "from parcelkit.rates import Tariff\n\n\n"
            "def test_heavier():\n    assert Tariff(3).price(2) == 6\n"
        },
    )
    repo.commit(
        "Hidden totals as sums", {"src/parcelkit/hidden.py": "def secret_total(a, b):\n    return sum((a, b))\n"}
    )
    repo.commit(
        machine("Remote zones as a set"), {"src/parcelkit/rates.py": moved.replace('("remote",)', '{"remote"}')}
    )
    second = run_check(repo, "HEAD")
    assert second.code == 0, second.stdout + second.stderr
    assert report_of(second)["selection"]["map"] == "updated"
    assert set(report_of(second)["selection"]["selected"]) == {REMOTE}
    base_tree = repo.git("rev-parse", "HEAD~1^{tree}").strip()
    updated_file = next(path for path in maps(repo) if path.name.startswith(base_tree))
    updated = records_of(updated_file)

    updated_file.unlink()  # the same base from scratch: coverage.py's record of the whole suite at the new base
    for older in maps(repo):
        older.unlink()
    third = run_check(repo, "HEAD")
    assert report_of(third)["selection"]["map"] == "built"
    built = records_of(next(path for path in maps(repo) if path.name.startswith(base_tree)))
    assert updated == built
    assert "tests/test_heavier.py::test_heavier" in updated["outcomes"]
    assert {PRICE, DESCRIBE, HIDDEN_TEST} <= set(updated["outcomes"])
