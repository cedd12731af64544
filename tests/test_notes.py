"""Git notes: one JSON note per checked commit, read back through git itself."""

from __future__ import annotations

import json
import os
from pathlib import Path

from conftest import machine, run_check

from verifier.demo import scenario as demo
from verifier.demo.scratch import ScratchRepo
from verifier.gitio import Git
from verifier.models import Report
from verifier.report import notes

BASE_FILES = {"parcelkit/__init__.py": "", "parcelkit/rates.py": demo.RATES, "tests/test_rates.py": demo.TEST_RATES}
FIELDS = {"format", "tool", "commit", "checks"}  # format 2: one entry per check under "checks"
ENTRY_FIELDS = {
    "version",
    "checked_at",
    "how",
    "skipped",
    "range",
    "verdict",
    "agent",
    "machine_lines",
    "coverage",
    "tests",
    "findings",
    "waivers",
    "sandbox",
    "mutants",
}


def shown(repo: ScratchRepo, sha: str, ref: str = notes.DEFAULT_REF) -> dict:
    """The note as git itself shows it (`git notes show`), parsed."""
    return json.loads(repo.git("notes", f"--ref={ref}", "show", sha))


def newest(repo: ScratchRepo, sha: str, ref: str = notes.DEFAULT_REF) -> dict:
    """The newest check of the note git shows (the last entry of ``checks``)."""
    return shown(repo, sha, ref)["checks"][-1]


def test_a_checked_range_gets_one_note_per_commit(repo: ScratchRepo) -> None:
    base = repo.commit("Start parcelkit", BASE_FILES)
    human = repo.commit("Human: readme", {"README.md": "# parcelkit\n"})
    marked = repo.commit(
        machine("Add zones"), {"parcelkit/zones.py": demo.ZONES, "tests/test_zones.py": demo.TEST_ZONES}
    )
    out = run_check(repo, f"{base}..HEAD", env={"CI": ""})  # by hand, even when the suite itself runs in CI
    assert out.report is not None, out.stderr
    listed = repo.git("notes", f"--ref={notes.DEFAULT_REF}", "list").split()
    assert sorted(listed[1::2]) == sorted([human, marked])  # `git notes list`: "<note blob> <commit>" pairs
    full = shown(repo, marked)
    assert set(full) == FIELDS and len(full["checks"]) == 1
    body = full["checks"][0]
    assert set(body) == ENTRY_FIELDS
    assert full["format"] == 2 and full["tool"] == "verifier" and full["commit"] == marked
    counts = out.report["finding_counts"]  # every finding per rule, exact, in the note as in the report
    assert body["range"] == {
        "base": base,
        "head": marked,
        "commits": 2,
        "verdict": "block",
        "findings": [],
        "finding_counts": counts,
    }
    assert sum(counts.values()) == len(out.report["findings"])
    assert body["verdict"] == "block" == out.report["verdict"]
    assert body["agent"] == demo.AGENT and body["how"] == "by-hand" and body["skipped"] is False
    assert body["machine_lines"] == sum(len(lines) for lines in out.report["machine_lines"].values())
    assert body["checked_at"].endswith("Z")
    assert body["coverage"] == {key: out.report["coverage"][key] for key in ("executable", "covered", "percent")}
    assert body["tests"] == {"run": out.report["tests"]["run"], "failed": 0}
    assert body["sandbox"] == out.report["sandbox"]
    assert {f["rule"] for f in body["findings"]} == {f["rule"] for f in out.report["findings"]}
    assert all(set(f) == {"rule", "severity", "path", "line", "message"} for f in body["findings"])
    assert newest(repo, human)["agent"] is None and newest(repo, human)["machine_lines"] == 0
    assert newest(repo, human)["verdict"] == "pass" and newest(repo, human)["findings"] == []  # no lines, no block
    assert notes.read_notes(Git(repo.path)) == {human: shown(repo, human), marked: full}


def test_a_rerun_adds_an_entry_to_the_note_and_no_notes_skips(repo: ScratchRepo) -> None:
    repo.commit("Start parcelkit", BASE_FILES)
    sha = repo.commit("Human tweak", {"README.md": "x\n"})
    assert run_check(repo, sha, "--no-notes").code == 0
    assert repo.git("for-each-ref", "refs/notes/") == ""
    run_check(repo, sha)
    run_check(repo, sha)
    assert len(repo.git("notes", f"--ref={notes.DEFAULT_REF}", "list").splitlines()) == 1
    assert len(repo.git("rev-list", notes.DEFAULT_REF).split()) == 2  # two writes of the one note
    assert len(shown(repo, sha)["checks"]) == 2  # the second check kept the first one's entry


def test_the_notes_ref_is_configurable(repo: ScratchRepo) -> None:
    repo.commit("Start parcelkit", BASE_FILES)
    sha = repo.commit("Human tweak", {"README.md": "x\n"})
    run_check(repo, sha, "--notes-ref", "gate-audit")
    assert shown(repo, sha, "refs/notes/gate-audit")["commit"] == sha
    repo.git("config", "verifier.notesRef", "refs/notes/from-config")
    run_check(repo, sha)
    assert shown(repo, sha, "refs/notes/from-config")["commit"] == sha
    assert repo.git("for-each-ref", "--format=%(refname)", notes.DEFAULT_REF) == ""


def test_a_note_that_is_not_json_is_reported_as_invalid(repo: ScratchRepo) -> None:
    sha = repo.commit("Start parcelkit", BASE_FILES)
    repo.git("notes", f"--ref={notes.DEFAULT_REF}", "add", "-m", "hand-written, not JSON", sha)
    found = notes.read_notes(Git(repo.path))[sha]
    assert found["format"] is None and "not JSON" in found["invalid"]


def test_notes_are_written_without_a_git_identity(tmp_path: Path) -> None:
    repo = ScratchRepo(tmp_path / "repo")
    sha = repo.commit("Start parcelkit", BASE_FILES)
    repo.git("config", "--unset", "user.name")
    repo.git("config", "--unset", "user.email")
    home = tmp_path / "home"
    home.mkdir()
    anonymous = {"HOME": str(home), "XDG_CONFIG_HOME": str(home), "GIT_CONFIG_NOSYSTEM": "1", "EMAIL": ""}
    for key in ("GIT_AUTHOR_NAME", "GIT_AUTHOR_EMAIL", "GIT_COMMITTER_NAME", "GIT_COMMITTER_EMAIL"):
        anonymous[key] = ""
    env = {k: v for k, v in {**os.environ, **anonymous}.items() if v != "" or k == "EMAIL"}
    out = run_check(repo, sha, env=env)
    assert out.code == 0, out.stderr
    assert "could not write" not in out.stderr
    assert shown(repo, sha)["commit"] == sha


def test_a_pending_verdict_only_annotates_the_commit_it_was_for(repo: ScratchRepo, tmp_path: Path) -> None:
    """The staged verdict waits under the git dir keyed by tree; another tree or parent gets no note."""
    from verifier.change.stage import RevisionSpec
    from verifier.pipeline import verify

    repo.commit("Start parcelkit", BASE_FILES)
    git = Git(repo.path)
    repo.write({"README.md": "staged\n"})
    repo.git("add", "README.md")
    tree = notes.staged_tree(git)
    # `git write-tree` on the real index is the outside reference for the tree the index would commit.
    assert tree == repo.git("write-tree").strip()
    repo.git("reset", "-q")  # an empty staged change is verified without a test run
    report = verify(repo.path, RevisionSpec(staged=True, message=machine("Readme")))
    notes.save_pending(git, report, notes.staged_tree(git))
    repo.commit("Something else entirely", {"README.md": "different\n"})
    assert notes.note_pending(git) is None
    assert not (notes.state_dir(git) / "pending").exists()

    repo.git("reset", "-q", "--hard", "HEAD~1")
    notes.save_pending(git, report, notes.staged_tree(git))
    sha = repo.commit(machine("Readme"))  # --allow-empty: the tree is the parent's, as staged
    assert notes.note_pending(git) == sha
    assert newest(repo, sha)["range"]["head"] == sha and newest(repo, sha)["agent"] == demo.AGENT
    assert newest(repo, sha)["how"] == "commit-hook"


LAUNCH = 'import os\n\n\ndef launch(label):\n    return os.system("lp " + label)\n'  # calls.banned: a shell


def test_a_range_check_keeps_the_earlier_check_and_judges_each_commit_by_its_own_lines(repo: ScratchRepo) -> None:
    base = repo.commit("Start parcelkit", BASE_FILES)
    clean = repo.commit(
        machine("Add volume"), {"parcelkit/volume.py": demo.VOLUME, "tests/test_volume.py": demo.TEST_VOLUME}
    )
    single = run_check(repo, clean)
    assert single.code == 0 and single.report is not None and single.report["verdict"] == "pass", single.stderr
    human = repo.commit("Readme", {"README.md": "# parcelkit\n"})
    risky = repo.commit(machine("Print labels"), {"parcelkit/launch.py": LAUNCH})
    ranged = run_check(repo, f"{base}..HEAD")
    assert ranged.code == 1 and ranged.report is not None and ranged.report["verdict"] == "block"

    first, second = shown(repo, clean)["checks"]  # the single check is still there, the range check after it
    assert (first["verdict"], first["range"]["commits"], first["range"]["verdict"]) == ("pass", 1, "pass")
    assert second["verdict"] == "pass" and second["findings"] == [] and second["waivers"] == []
    assert {k: second["range"][k] for k in ("base", "head", "commits", "verdict")} == {
        "base": base,
        "head": risky,
        "commits": 3,
        "verdict": "block",
    }
    own = newest(repo, risky)
    assert own["verdict"] == "block" and "calls.banned" in {f["rule"] for f in own["findings"]}
    for finding in own["findings"]:
        if finding["line"]:  # git blame (git itself) gives every located finding's line to the risky commit
            line = f"-L{finding['line']},{finding['line']}"
            assert repo.git("blame", "--porcelain", line, risky, "--", finding["path"]).split()[0] == risky
    person = newest(repo, human)  # a person's commit in a blocked range: nothing of its own, never block
    assert (person["verdict"], person["machine_lines"], person["findings"]) == ("pass", 0, [])
    # every finding of the check is recorded once: on the commit of its line, or once as a fact of the range
    recorded = sum(len(newest(repo, sha)["findings"]) for sha in (clean, human, risky))
    assert recorded + len(own["range"]["findings"]) == len(ranged.report["findings"])


def test_a_check_in_ci_says_so(repo: ScratchRepo) -> None:
    repo.commit("Start parcelkit", BASE_FILES)
    sha = repo.commit("Human tweak", {"README.md": "x\n"})
    run_check(repo, sha, env={"CI": "true"})  # common practice: CI services set CI=true
    assert newest(repo, sha)["how"] == "ci"


def _entry(verdict: str, number: int) -> dict:
    return {"checked_at": f"2026-01-{number + 1:02d}T00:00:00Z", "how": "by-hand", "skipped": False, "verdict": verdict}


def test_entries_are_kept_newest_last_up_to_the_cap() -> None:
    body = None
    for number in range(notes.MAX_CHECKS + 5):
        body = notes.appended(body, "c0ffee", _entry("pass" if number % 2 else "block", number))
    assert body is not None and len(body["checks"]) == notes.MAX_CHECKS and body["dropped"] == 5
    assert body["checks"][-1]["checked_at"] == f"2026-01-{notes.MAX_CHECKS + 5:02d}T00:00:00Z"  # newest last
    record = notes.read_record(json.loads(json.dumps(body)))
    assert record is not None and record.dropped == 5 and record.newest is not None
    assert record.newest.verdict == "block"  # entry 24 of 0..24: even


def test_a_format_1_note_is_read_and_kept_as_the_first_entry() -> None:
    old = {
        "format": 1,
        "tool": "verifier",
        "commit": "c0ffee",
        "verdict": "warn",
        "range": {"base": "b", "head": "h"},
        "findings": [{"rule": "patch.size", "severity": "warn", "path": None, "line": None, "message": "big"}],
        "waivers": [],
        "coverage": {"percent": 80.0},
    }
    record = notes.read_record(old)
    assert record is not None and record.newest is not None and record.problem is None
    assert (record.newest.how, record.newest.verdict, record.newest.coverage_percent) == ("unknown", "warn", 80.0)
    assert record.newest.findings == () and len(record.newest.range_findings) == 1  # copied onto every commit
    body = notes.appended(old, "c0ffee", notes.skipped_entry("pre-push", "bypassed by VERIFIER_BYPASS: a hotfix"))
    assert body["format"] == 2 and [e["how"] for e in body["checks"]] == ["unknown", "pre-push"]
    newer = notes.read_record(body)
    assert newer is not None and newer.newest is not None and newer.newest.skipped and newer.newest.verdict is None
    assert newer.checks[0].verdict == "warn"


def test_an_unreadable_note_is_kept_when_a_check_is_added(repo: ScratchRepo) -> None:
    repo.commit("Start parcelkit", BASE_FILES)
    sha = repo.commit("Human tweak", {"README.md": "x\n"})
    repo.git("notes", f"--ref={notes.DEFAULT_REF}", "add", "-m", "hand-written, not JSON", sha)
    notes.record_skipped(Git(repo.path), [sha], "commit-hook", "bypassed by VERIFIER_BYPASS: a hotfix")
    body = shown(repo, sha)
    assert body["unreadable_earlier_note"].startswith("hand-written") and body["checks"][0]["skipped"] is True


# -- the per-commit split, on data ----------------------------------------------------------------------


def _report(findings: list, waivers: tuple = ()) -> Report:
    from verifier.models import Change, Commit, MachineMark, Provenance, Report

    commits = tuple(Commit(sha, (), "a", "c", "m") for sha in ("A", "H", "B"))
    provenance = Provenance(
        machine_lines={"pk/a.py": (1, 3)},
        line_commits={"pk/a.py": {1: "A", 2: "H", 3: "B"}},
        marks={"A": MachineMark(demo.AGENT), "B": MachineMark(demo.AGENT)},
    )
    change = Change("base..B", "range", "base", "B", commits, ())
    return Report("block", change, provenance, "verifier.yaml", None, None, tuple(findings), waivers_used=waivers)


def test_findings_go_to_the_commit_of_their_line_and_the_rest_to_the_range() -> None:
    from verifier.models import Finding, Waiver

    waiver = Waiver("calls.banned", "pk/**", "vendored", "ada", "2099-01-01", source="verifier.yaml:7")
    waived = {"waived_by": {"source": "verifier.yaml:7"}}
    findings = [
        Finding("calls.banned", "info", "a shell, waived", "pk/a.py", 1, waived),
        Finding("coverage.new-lines", "block", "never executed", "pk/a.py", 3),
        Finding("coverage.new-lines", "block", "1 of 2 lines executed"),  # sums up the located ones: B's
        Finding("tests.failing", "block", "tests/test_a.py::test_x failed", "tests/test_a.py"),  # the range's
        Finding("weakened.tests", "block", "assert removed", "tests/test_a.py", 9),  # a line no commit introduced
    ]
    report = _report(findings, (waiver,))
    a_own, a_range = notes.split_findings(report, "A")
    assert a_own == findings[:1] and a_range == findings[3:]
    b_own, _ = notes.split_findings(report, "B")
    assert b_own == findings[1:3]
    entry_a = notes.check_entry(report, "A", "by-hand")
    assert entry_a["verdict"] == "block"  # its own finding is waived, the failing test of the range blocks it
    assert [w["rule"] for w in entry_a["waivers"]] == ["calls.banned"]
    assert [f["rule"] for f in entry_a["range"]["findings"]] == ["tests.failing", "weakened.tests"]
    assert notes.check_entry(report, "B", "by-hand")["waivers"] == []
    person = notes.check_entry(report, "H", "by-hand")  # a person's commit: no machine lines, never block
    assert (person["verdict"], person["findings"], person["machine_lines"]) == ("pass", [], 0)
    assert person["range"]["verdict"] == "block"


def test_an_entry_keeps_a_bounded_number_of_findings() -> None:
    from verifier.models import Finding

    many = [Finding("secrets.literal", "block", "a key", "pk/a.py", 1) for _ in range(notes.MAX_FINDINGS + 50)]
    entry = notes.check_entry(_report(many), "A", "pre-push")
    assert len(entry["findings"]) == notes.MAX_FINDINGS and entry["findings_left_out"] == 50
