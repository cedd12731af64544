"""Test selection end to end: real git repositories, the real CLI, pytest and coverage.py in the sandbox.

The expected selections are derived by hand from which test calls which function of the scratch
library below; the map the gate builds comes from coverage.py's own per-test contexts.
"""

from __future__ import annotations

import json
import subprocess
import sys

from conftest import ROOT, machine, ran, run_check

from verifier.demo.scratch import ScratchRepo

RATES = '''\
"""Parcel rates of Quillfeather Logistics."""

BASE = 4


def base_rate(weight):
    if weight > 10:
        return BASE + 2
    return BASE


def surcharge(zone):
    return 3 if zone == "remote" else 0
'''

LIBRARY = {
    "src/parcelkit/__init__.py": "",
    "src/parcelkit/rates.py": RATES,
    "src/parcelkit/labels.py": "from parcelkit.rates import surcharge\n\n\ndef label(zone):\n"
    '    return f"{zone}:{surcharge(zone)}"\n',
    "tests/test_rates.py": "from parcelkit.rates import base_rate, surcharge\n\n\n"
    "def test_light():\n    assert base_rate(1) == 4\n\n\n"
    "def test_heavy():\n    assert base_rate(11) == 6\n\n\n"
    'def test_remote():\n    assert surcharge("remote") == 3\n',
    "tests/test_labels.py": "from parcelkit.labels import label\n\n\n"
    'def test_label():\n    assert label("remote") == "remote:3"\n',
    "tests/test_misc.py": "def test_unrelated():\n    assert 1 + 1 == 2\n",
}
LIGHT, HEAVY, REMOTE = (f"tests/test_rates.py::test_{name}" for name in ("light", "heavy", "remote"))
LABEL, UNRELATED = "tests/test_labels.py::test_label", "tests/test_misc.py::test_unrelated"


OBSERVED = "selection:\n  run: observed\n"


def library(repo: ScratchRepo, policy: str = OBSERVED, extra: dict[str, str] | None = None) -> None:
    repo.commit("parcelkit rates and labels", {**LIBRARY, **(extra or {}), "verifier.yaml": policy})


def change_heavy_branch(repo: ScratchRepo, new: str = "BASE + 1 + 1") -> None:
    repo.commit(machine("Spell out the heavy surcharge"), {"src/parcelkit/rates.py": RATES.replace("BASE + 2", new)})


def test_selection_runs_exactly_the_tests_that_executed_the_changed_function_and_caches_the_map(repo):
    library(repo)
    change_heavy_branch(repo)
    first = run_check(repo, "HEAD")
    assert first.code == 0, first.stdout + first.stderr
    selection = first.report["selection"]
    assert selection["map"] == "built"
    # base_rate() ran in test_light and test_heavy only; surcharge(), label() and the rest never call it.
    assert set(selection["selected"]) == {LIGHT, HEAVY}
    assert ran(first) == {LIGHT, HEAVY}
    assert (selection["known_tests"], selection["left_out"]) == (5, 3)
    assert "ran parcelkit.rates.base_rate, which the change modifies" in selection["selected"][HEAVY]
    assert "3 of 5 known tests left out" in first.stdout

    cache = repo.path / ".git" / "verifier" / "cache" / "impact"
    files = list(cache.glob("*.json"))
    assert len(files) == 1
    base_tree = repo.git("rev-parse", "HEAD~1^{tree}").strip()  # git's own tree hash keys the cache
    assert files[0].name.startswith(base_tree)
    second = run_check(repo, "HEAD")
    assert second.report["selection"]["map"] == "cached"
    assert "map: cached" in second.stdout
    assert ran(second) == {LIGHT, HEAVY}
    assert repo.git("status", "--porcelain") == ""  # the cache is outside the working tree


def test_a_conftest_change_runs_the_whole_suite(repo):
    library(repo, extra={"tests/conftest.py": "import pytest\n"})
    repo.commit(
        "Add a zone fixture (by a person)",
        {
            "tests/conftest.py": "import pytest\n\n\n@pytest.fixture\ndef zone():\n    return 'remote'\n",
        },
    )
    change_heavy_branch(repo)
    out = run_check(repo, "HEAD~2..HEAD")
    assert out.code == 0, out.stdout + out.stderr
    selection = out.report["selection"]
    assert selection["whole_suite"] is True
    assert "tests/conftest.py" in selection["reason"]
    assert ran(out) == {LIGHT, HEAVY, REMOTE, LABEL, UNRELATED}


def test_without_a_map_the_import_graph_chooses(repo):
    library(repo, policy=OBSERVED + "  map_build: never\n  without_map: imports\n")
    repo.commit(
        machine("Remote zones cost one more"),
        {
            "src/parcelkit/rates.py": RATES.replace(
                'return 3 if zone == "remote" else 0', 'return 3 if zone in ("remote", "island") else 0'
            ),
        },
    )
    out = run_check(repo, "HEAD")
    assert out.code == 0, out.stdout + out.stderr
    selection = out.report["selection"]
    assert selection["map"].startswith("absent")
    # test_rates imports rates directly; test_labels through labels.py; test_misc imports neither.
    assert set(selection["selected"]) == {"tests/test_rates.py", "tests/test_labels.py"}
    assert ran(out) == {LIGHT, HEAVY, REMOTE, LABEL}
    assert not (repo.path / ".git" / "verifier" / "cache" / "impact").exists()


FLAKY = """\
from pathlib import Path


def test_flaky():
    # Fails on its first run only: the counter lives in the sandbox's copy of the tree, which the
    # harness's re-runs share.
    counter = Path("flaky-counter")
    runs = int(counter.read_text()) if counter.exists() else 0
    counter.write_text(str(runs + 1))
    assert runs >= 1


def test_always_fails():
    assert 2 + 2 == 5
"""


def test_a_test_that_passes_on_a_rerun_is_reported_flaky_and_a_real_failure_still_blocks(repo):
    # test_always_fails fails at base too: a pre-existing failure warns unless the policy blocks those as well
    policy = "selection:\n  run: all\n  reruns: 2\nrules:\n  tests.failing:\n    block_pre_existing: true\n"
    library(repo, policy=policy, extra={"tests/test_flaky.py": FLAKY})
    change_heavy_branch(repo)
    out = run_check(repo, "HEAD")
    outcomes = {t["node_id"]: t for t in out.report["tests"]["outcomes"]}
    assert outcomes["tests/test_flaky.py::test_flaky"] == {
        "node_id": "tests/test_flaky.py::test_flaky",
        "outcome": "flaky",
        "attempts": 2,
    }
    assert outcomes["tests/test_flaky.py::test_always_fails"]["outcome"] == "failed"
    assert outcomes["tests/test_flaky.py::test_always_fails"]["attempts"] == 3  # the first run and 2 re-runs
    by_rule = {(f["rule"], f["path"], f["severity"]) for f in out.report["findings"]}
    assert ("tests.flaky", "tests/test_flaky.py", "warn") in by_rule
    failing = [f["message"] for f in out.report["findings"] if f["rule"] == "tests.failing"]
    assert len(failing) == 1 and "test_always_fails" in failing[0]
    assert out.report["verdict"] == "block" and out.code == 1


def test_the_differential_run_blocks_only_what_the_change_breaks(repo):
    known_bug = {"tests/test_known.py": "def test_known_bug():\n    assert round(2.5) == 3  # banker's rounding\n"}
    library(repo, policy=OBSERVED + '  differential: true\nrules:\n  tests.failing: "ignore"\n', extra=known_bug)
    change_heavy_branch(repo, new="BASE + 3")
    out = run_check(repo, "HEAD")
    classes = out.report["tests"]["differential"]
    # Python's docs (round(), built-in functions): round(2.5) == 2, so test_known_bug fails at base too.
    assert classes["still-failing"] == ["tests/test_known.py::test_known_bug"]
    assert classes["broken"] == [HEAVY]
    assert classes["unchanged"] == [LIGHT]
    broken = [f for f in out.report["findings"] if f["rule"] == "tests.broken"]
    assert [f["path"] for f in broken] == ["tests/test_rates.py"]
    assert "passed at base, fails at head" in broken[0]["message"]
    assert not [f for f in out.report["findings"] if f["rule"] == "tests.failing"]
    assert out.code == 1


def test_parts_split_the_tests_and_their_joined_reports_give_the_verdict_of_one_run(repo, tmp_path):
    library(repo, policy="selection:\n  run: all\n  reruns: 0\n")
    change_heavy_branch(repo, new="BASE + 3")  # breaks test_heavy: the verdict is block
    whole = run_check(repo, "HEAD")
    shards = [run_check(repo, "HEAD", "--part", f"{k}/2") for k in (1, 2)]
    parts = [ran(shard) for shard in shards]
    # a part cannot judge coverage alone: it ends with its own outcome (exit 4), never a block
    assert [(s.code, s.report["verdict"]) for s in shards] == [(4, "part"), (4, "part")]
    assert all((s.stdout + s.stderr).startswith("PART ") and "'verifier join'" in s.stdout + s.stderr for s in shards)
    assert parts[0] and parts[1] and not parts[0] & parts[1]
    assert parts[0] | parts[1] == ran(whole) == {LIGHT, HEAVY, REMOTE, LABEL, UNRELATED}

    files = []
    for k, shard in enumerate(shards, start=1):
        files.append(tmp_path / f"part-{k}.json")
        files[-1].write_text(json.dumps(shard.report))
    merged_file = tmp_path / "merged.json"
    done = subprocess.run(
        [
            sys.executable,
            "-m",
            "verifier",
            "-C",
            str(repo.path),
            "join",
            *map(str, files),
            "--format",
            "json",
            "--output",
            str(merged_file),
        ],
        capture_output=True,
        text=True,
        env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"},
    )
    merged = json.loads(merged_file.read_text())
    assert (done.returncode, merged["verdict"]) == (whole.code, whole.report["verdict"]) == (1, "block")
    assert {t["node_id"] for t in merged["tests"]["outcomes"]} == ran(whole)
    assert merged["coverage"]["covered"] == whole.report["coverage"]["covered"]
    key = sorted((f["rule"], f["path"], f["message"]) for f in whole.report["findings"])
    assert sorted((f["rule"], f["path"], f["message"]) for f in merged["findings"]) == key

    missing = subprocess.run(
        [sys.executable, "-m", "verifier", "-C", str(repo.path), "join", str(files[0])],
        capture_output=True,
        text=True,
        env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"},
    )
    assert missing.returncode == 2 and "part 2/2 is missing" in missing.stderr
