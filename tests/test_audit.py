"""The audit on a real history with fixed dates: exact counts, checked against git's own blame and numstat."""

from __future__ import annotations

import csv
import io
import json
import subprocess
import sys
from pathlib import Path

import pytest

from tests.conftest import ROOT, machine, run_audit_cli
from verifier.audit.build import AuditRequest, run_audit
from verifier.audit.model import FilePatch
from verifier.audit.patches import parse_patch
from verifier.demo.scratch import ScratchRepo

WINDOW = AuditRequest(
    since="2024-03-04", until="2024-03-10", weeks=2, agent_emails=("quill-assist@quillfeather.example",)
)
AGENT_IDENTITY = ("quill-assist", "quill-assist@quillfeather.example")
NOTES = "refs/notes/verifier"


def _date(day: str, hour: int = 12) -> str:
    return f"2024-{day}T{hour:02d}:00:00+0000"


def _note(repo: ScratchRepo, sha: str, verdict: str, findings=(), waivers=(), percent=100.0) -> None:
    body = {
        "format": 1,
        "tool": "verifier",
        "version": "0.1.0",
        "checked_at": "2024-03-04T00:00:00Z",
        "commit": sha,
        "range": {"base": None, "head": sha},
        "verdict": verdict,
        "agent": "quill-assist/2.3",
        "machine_lines": 0,
        "coverage": {"executable": 4, "covered": 4, "percent": percent},
        "tests": {"run": 3, "failed": 0},
        "findings": list(findings),
        "waivers": list(waivers),
        "sandbox": "namespace",
    }
    repo.git("notes", f"--ref={NOTES}", "add", "-m", json.dumps(body), sha)  # the contract: one JSON note


def _lines(prefix: str, count: int) -> str:
    return "".join(f"{prefix}_{n} = {n}\n" for n in range(1, count + 1))


@pytest.fixture(scope="module")
def history(tmp_path_factory: pytest.TempPathFactory) -> tuple[ScratchRepo, dict[str, str]]:
    """A week of parcelkit work: people and quill-assist, notes present, absent, blocking and unreadable,
    a rewrite, a side branch merged, a revert, an unmarked commit by the assistant's identity."""
    repo = ScratchRepo(tmp_path_factory.mktemp("audit") / "repo")
    c: dict[str, str] = {}
    c["base"] = repo.commit(
        "Start parcelkit", {"parcelkit/rates.py": _lines("rate", 3), "README.md": "parcelkit\n"}, date=_date("02-20")
    )
    c["M0"] = repo.commit(machine("Old helper"), {"parcelkit/old.py": _lines("old", 2)}, date=_date("02-28"))
    _note(repo, c["M0"], "pass")
    c["M1"] = repo.commit(machine("Add zones"), {"parcelkit/zones.py": _lines("zone", 4)}, date=_date("03-04", 10))
    _note(repo, c["M1"], "pass")
    c["H1"] = repo.commit("Tune rates", {"parcelkit/rates.py": _lines("rate", 5)}, date=_date("03-04"))
    _note(repo, c["H1"], "pass")  # a person's commit with a note: not counted
    c["M2"] = repo.commit(
        machine("More rates", agent="quill-assist/2.4"),
        {"parcelkit/rates.py": _lines("rate", 5) + _lines("surcharge", 3)},
        date=_date("03-05", 9),
    )
    finding = {
        "rule": "coverage.new-lines",
        "severity": "block",
        "path": "parcelkit/rates.py",
        "line": 6,
        "message": "not run",
    }
    _note(repo, c["M2"], "block", findings=[finding], percent=0)
    c["M3"] = repo.commit(machine("Add labels"), {"parcelkit/labels.py": _lines("label", 5)}, date=_date("03-05"))
    zones = _lines("zone", 4).split("\n")
    zones[1:3] = ["zone_two = 'rewritten'", "zone_three = 'rewritten'"]
    c["H2"] = repo.commit("Fix two zones", {"parcelkit/zones.py": "\n".join(zones)}, date=_date("03-06"))
    repo.git("checkout", "-q", "-b", "feature")
    c["M4"] = repo.commit(machine("Tracking"), {"parcelkit/track.py": _lines("track", 3)}, date=_date("03-07", 9))
    _note(
        repo,
        c["M4"],
        "warn",
        waivers=[
            {"rule": "patch.size", "path": "parcelkit/**", "reason": "big", "owner": "ada", "expires": "2024-04-01"}
        ],
    )
    repo.git("checkout", "-q", "main")
    c["H3"] = repo.commit("Readme", {"README.md": "parcelkit\nrates and zones\n"}, date=_date("03-07"))
    dated = {"GIT_AUTHOR_DATE": _date("03-08"), "GIT_COMMITTER_DATE": _date("03-08")}
    repo.git("merge", "-q", "--no-ff", "--no-edit", "feature", env=dated)
    c["merge"] = repo.head()
    revert_date = {"GIT_AUTHOR_DATE": _date("03-09", 9), "GIT_COMMITTER_DATE": _date("03-09", 9)}
    repo.git("revert", "--no-edit", c["M3"], env=revert_date)
    c["R"] = repo.head()
    c["U"] = repo.commit(
        "Util helpers", {"parcelkit/util.py": _lines("util", 2)}, date=_date("03-09"), author=AGENT_IDENTITY
    )
    c["M5"] = repo.commit(
        machine("One more zone"), {"parcelkit/zones.py": "\n".join(zones) + "zone_five = 5\n"}, date=_date("03-10")
    )
    repo.git("notes", f"--ref={NOTES}", "add", "-m", "not json {", c["M5"])
    c["after"] = repo.commit("Drop zones", remove=("parcelkit/zones.py",), date=_date("03-12"))
    return repo, c


def test_totals_are_exact(history):
    repo, c = history
    audit = run_audit(repo.path, WINDOW)
    w = audit.window
    assert audit.end == c["M5"]  # the newest first-parent commit before the window's end, not "after"
    assert w.commits == 11
    assert w.machine_commits == 6  # M1 M2 M3 M4 M5 and the unmarked U
    assert (w.verified, w.unverified, w.blocked_merged) == (3, 3, 1)
    assert w.machine_lines_added == 4 + 3 + 5 + 3 + 2 + 1
    assert w.machine_lines_alive == 2 + 3 + 0 + 3 + 2 + 1  # H2 rewrote two of M1's, R reverted M3
    assert w.machine_lines_churned == 2 + 5
    assert w.lines_added == 23


def test_rows_and_attention(history):
    repo, c = history
    audit = run_audit(repo.path, WINDOW)
    rows = {r.sha: r for r in audit.commits}
    assert set(rows) == {c[k] for k in ("M1", "M2", "M3", "M4", "U", "M5")}
    assert [r.status for r in audit.commits[:4]] == ["unverified"] * 3 + ["blocked-merged"]
    assert {r.sha for r in audit.attention} == {c["M3"], c["U"], c["M5"], c["M2"]}
    assert rows[c["U"]].agent == "quill-assist@quillfeather.example" and not rows[c["U"]].marked
    assert rows[c["M2"]].agent == "quill-assist/2.4" and rows[c["M2"]].coverage_percent == 0
    assert "not JSON" in (rows[c["M5"]].note_problem or "")
    assert rows[c["M3"]].reverted_by == c["R"]
    assert [(r.sha, r.reverted) for r in audit.reverts] == [(c["R"], c["M3"])]
    assert audit.findings_by_rule == (("coverage.new-lines", "block", 1),)
    assert audit.waivers_by_rule == (("patch.size", 1),)
    agents = {g.name: g for g in audit.agents}
    assert agents["quill-assist/2.3"].commits == 4 and agents["quill-assist/2.3"].unverified == 2
    assert agents["quill-assist/2.4"].blocked_merged == 1
    assert [g.name for g in audit.people] == ["Ada Okafor <ada.okafor@quillfeather.example>"]


def test_trend_weeks(history):
    repo, _c = history
    audit = run_audit(repo.path, WINDOW)
    assert [p.since[:10] for p in audit.trend] == ["2024-02-19", "2024-02-26", "2024-03-04"]
    assert [(p.commits, p.machine_commits) for p in audit.trend] == [(1, 0), (1, 1), (11, 6)]
    assert audit.trend[1].verified_share == 100.0 and audit.trend[1].machine_lines_alive == 2


def test_survival_agrees_with_git_blame(history):
    """The replay against git itself: blame of the window-end revision, whole files, every file."""
    repo, c = history
    audit = run_audit(repo.path, WINDOW)
    machine_shas = {r.sha for r in audit.commits}
    blamed: dict[str, int] = {}
    for path in repo.git("ls-tree", "-r", "--name-only", c["M5"]).split():
        porcelain = repo.git("blame", "--porcelain", c["M5"], "--", path)
        for line in porcelain.split("\n"):
            fields = line.split(" ")
            if len(fields[0]) == 40 and len(fields) >= 3 and fields[0] in machine_shas:
                blamed[fields[0]] = blamed.get(fields[0], 0) + 1
    assert {r.sha: r.lines_alive for r in audit.commits if r.lines_alive} == blamed


def test_lines_added_agree_with_numstat(history):
    repo, _c = history
    audit = run_audit(repo.path, WINDOW)
    for row in audit.commits:
        numstat = repo.git("log", "-1", "--numstat", "--format=", row.sha)  # git's own count of added lines
        assert row.lines_added == sum(int(line.split("\t")[0]) for line in numstat.split("\n") if line)


def test_cache_gives_the_same_audit(history):
    repo, _c = history
    first = run_audit(repo.path, WINDOW)
    again = run_audit(repo.path, WINDOW)
    fresh = run_audit(repo.path, AuditRequest(**{**WINDOW.__dict__, "use_cache": False}))
    assert first == again == fresh


def test_cache_sees_a_new_note_and_survives_damage(tmp_path: Path):
    repo = ScratchRepo(tmp_path / "repo")
    repo.commit("Start", {"parcelkit/rates.py": _lines("rate", 2)}, date=_date("03-01"))
    sha = repo.commit(machine("Add zones"), {"parcelkit/zones.py": _lines("zone", 3)}, date=_date("03-05"))
    window = AuditRequest(since="2024-03-04", until="2024-03-10", weeks=1)
    assert [run_audit(repo.path, window).window.unverified for _ in range(3)] == [1, 1, 1]  # cold, warm, warm
    _note(repo, sha, "pass")  # the notes ref moves on: the cached span must not hide the new note
    assert run_audit(repo.path, window).window.unverified == 0
    cache = Path(repo.git("rev-parse", "--git-common-dir").strip())
    cache = (cache if cache.is_absolute() else repo.path / cache) / "verifier" / "cache" / "audit"
    files = [f for f in cache.iterdir() if f.suffix == ".bin"]
    assert {f.name.split("-")[0] for f in files} >= {"span", "notes"}
    for damaged in files:
        damaged.write_bytes(damaged.read_bytes()[:-3] + b"xyz")  # the checksum no longer matches
    fresh = run_audit(repo.path, AuditRequest(**{**window.__dict__, "use_cache": False}))
    assert run_audit(repo.path, window) == fresh and fresh.window.verified == 1
    short = AuditRequest(**{**window.__dict__, "notes_ref": "verifier"})  # a short name, as git log --notes takes
    by_git = run_audit(repo.path, AuditRequest(**{**short.__dict__, "use_cache": False}))  # git log expands it
    assert run_audit(repo.path, short) == by_git and by_git.window.verified == 1  # the cached span: we expand it


def test_policy_waivers_are_read_again_when_the_policy_changes(tmp_path: Path):
    repo = ScratchRepo(tmp_path / "repo")
    waiver = "waivers:\n  - {rule: code.syntax, path: parcelkit/**, reason: draft, owner: ada, expires: 2024-03-15}\n"
    repo.commit("Start", {"verifier.yaml": waiver, "parcelkit/rates.py": _lines("rate", 2)}, date=_date("03-01"))
    window = AuditRequest(since="2024-03-04", until="2024-03-10", weeks=0)
    runs = [run_audit(repo.path, window) for _ in range(2)]  # the second reads the policy from the cache
    runs.append(run_audit(repo.path, AuditRequest(**{**window.__dict__, "use_cache": False})))
    assert runs[0] == runs[1] == runs[2] and not runs[0].problems
    assert [(e.waiver.rule, e.days_left) for e in runs[0].expiring_waivers] == [("code.syntax", 5)]  # 03-10 to 03-15
    repo.commit("No more waivers", {"verifier.yaml": "waivers: []\n"}, date=_date("03-06"))
    assert run_audit(repo.path, window).expiring_waivers == ()


def test_a_waiver_expired_by_the_window_end_is_listed_not_a_problem(tmp_path: Path):
    """A lapsed waiver no longer breaks the policy: the audit lists it with the days since it expired."""
    repo = ScratchRepo(tmp_path / "repo")
    waiver = "waivers:\n  - {rule: code.syntax, path: parcelkit/**, reason: draft, owner: ada, expires: 2024-03-07}\n"
    repo.commit("Start", {"verifier.yaml": waiver, "parcelkit/rates.py": _lines("rate", 2)}, date=_date("03-01"))
    audit = run_audit(repo.path, AuditRequest(since="2024-03-04", until="2024-03-10", weeks=0, use_cache=False))
    assert not audit.problems
    assert [(e.waiver.path, e.days_left) for e in audit.expiring_waivers] == [("parcelkit/**", -3)]  # 03-07 to 03-10


def test_agent_identities_come_from_the_trusted_policy(tmp_path: Path):
    repo = ScratchRepo(tmp_path / "repo")
    policy = f"version: 1\naudit:\n  agent_identities: [{AGENT_IDENTITY[1]}]\n"
    repo.commit("Start", {"verifier.yaml": policy, "parcelkit/rates.py": _lines("rate", 2)}, date=_date("03-01"))
    unmarked = repo.commit(
        "Helpers", {"parcelkit/util.py": _lines("util", 3)}, date=_date("03-05"), author=AGENT_IDENTITY
    )
    repo.commit("Human edit", {"parcelkit/rates.py": _lines("rate", 3)}, date=_date("03-06"))
    audit = run_audit(repo.path, AuditRequest(since="2024-03-04", until="2024-03-10", weeks=0))
    assert [(r.sha, r.agent, r.marked) for r in audit.commits] == [(unmarked, AGENT_IDENTITY[1], False)]
    assert audit.window.machine_lines_added == 3


def test_json_text_is_what_the_json_module_writes(history):
    from verifier.audit.report import render
    from verifier.audit.report.jsonfmt import as_dict

    audit = run_audit(repo_path(history), WINDOW)
    # format-1 notes (written by _note) copied the whole change's findings onto each commit: range findings
    assert audit.commits and any(c.findings or c.range_findings for c in audit.commits)
    # the reference layout is Python's own json.dumps with indent=2 (docs.python.org, json.dumps)
    assert render(audit, "json") == json.dumps(as_dict(audit), indent=2) + "\n"


def repo_path(history: tuple[ScratchRepo, dict[str, str]]) -> Path:
    return history[0].path


def test_cli_formats(history, tmp_path: Path):
    repo, c = history
    before = repo.git("for-each-ref") + repo.git("status", "--porcelain")
    out = tmp_path / "out"
    done = run_audit_cli(
        repo,
        *("--since", "2024-03-04", "--until", "2024-03-10", "--weeks", "2", "--agent-email", AGENT_IDENTITY[1]),
        *("--format", "json", "--format", "csv", "--format", "markdown", "--output", str(out)),
    )
    assert done.returncode == 0, done.stderr
    report = json.loads((out / "audit.json").read_text())
    assert report["format"] == 1
    assert report["window"] == {"since": "2024-03-04T00:00:00Z", "until": "2024-03-11T00:00:00Z"}
    assert {
        k: report["totals"][k]
        for k in (
            "commits",
            "machine_commits",
            "unverified",
            "blocked_merged",
            "machine_lines_added",
            "machine_lines_alive",
        )
    } == {
        "commits": 11,
        "machine_commits": 6,
        "unverified": 3,
        "blocked_merged": 1,
        "machine_lines_added": 18,
        "machine_lines_alive": 11,
    }
    first = report["commits"][0]
    assert set(first) >= {"sha", "agent", "committer", "verified", "verdict"} and first["verified"] is False
    rows = list(csv.DictReader(io.StringIO((out / "audit.csv").read_text())))  # Python's csv reads it back
    assert len(rows) == 6 and {r["sha"] for r in rows} == {x["sha"] for x in report["commits"]}
    summary = (out / "audit.md").read_text()
    assert "**3 unverified**" in summary and c["M3"][:12] in summary
    assert repo.git("for-each-ref") + repo.git("status", "--porcelain") == before  # nothing but the cache moved


def test_bad_dates_are_usage_errors(history):
    repo, _c = history
    done = run_audit_cli(repo, "--since", "last tuesday")
    assert done.returncode == 2 and "is not a date" in done.stderr and "Traceback" not in done.stderr


def test_parse_patch_skips_content_that_looks_like_headers():
    lines = [
        "diff --git a/x.py b/x.py",
        "index 1..2 100644",
        "--- a/x.py",
        "+++ b/x.py",
        "@@ -1,2 +1,3 @@",
        "---- not a header",
        "-diff --git a/y b/y",
        "+++ still content",
        "+@@ -9 +9 @@",
        "+x",
        'diff --git "a/sp ace\\t.py" "b/sp ace\\t.py"',
        "new file mode 100644",
        "index 0..1",
        'Binary files /dev/null and "b/sp ace\\t.py" differ',
    ]
    assert parse_patch(lines) == [FilePatch("x.py", "x.py", [1, 2, 1, 3]), FilePatch(None, "sp ace\t.py", [])]


def test_recheck_runs_the_gate_and_writes_the_note(tmp_path: Path):
    from tests.conftest import test_sandbox

    repo = ScratchRepo(tmp_path / "repo")
    first_test = "from pk.calc import add\n\n\ndef test_add():\n    assert add(1, 2) == 3\n"
    repo.commit(
        "Start",
        {"pk/__init__.py": "", "pk/calc.py": "def add(a, b):\n    return a + b\n", "tests/test_calc.py": first_test},
        date=_date("03-01"),
    )
    sha = repo.commit(
        machine("Add sub"),
        {
            "pk/calc.py": "def add(a, b):\n    return a + b\n\n\ndef sub(a, b):\n    return a - b\n",
            "tests/test_calc.py": "from pk.calc import add, sub\n\n\ndef test_add():\n    assert add(1, 2) == 3\n\n\n"
            "def test_sub():\n    assert sub(3, 2) == 1\n",
        },
        date=_date("03-05"),
    )
    window = ("--since", "2024-03-04", "--until", "2024-03-10", "--format", "json")
    first = run_audit_cli(repo, *window)
    assert first.returncode == 0, first.stderr
    assert json.loads(first.stdout)["totals"]["unverified"] == 1
    after = run_audit_cli(repo, *window, "--recheck", "--sandbox", test_sandbox())
    assert after.returncode == 0, after.stderr
    report = json.loads(after.stdout)
    assert report["totals"]["unverified"] == 0 and report["commits"][0]["verdict"] == "pass"
    note = json.loads(repo.git("notes", f"--ref={NOTES}", "show", sha))  # the note git holds now
    assert note["format"] == 2 and note["checks"][-1]["verdict"] == "pass" and note["commit"] == sha
    assert note["checks"][-1]["how"] == "audit-recheck"


def test_the_audit_reaches_git_only_through_gitio_and_reads_patches_with_the_gate_reader():
    """No git command line of its own (no Git.run / text / ok, no subprocess) in any audit module, and
    the patches come from the gate's diff reader with the gate's flags."""
    import ast

    from verifier.audit import patches
    from verifier.change import diff

    raw = []
    for module in sorted((ROOT / "verifier" / "audit").rglob("*.py")):
        tree = ast.parse(module.read_text())
        for node in ast.walk(tree):
            if isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute):
                receiver = ast.unparse(node.func.value)
                if node.func.attr in ("run", "text", "ok", "_spawn") and "git" in receiver.lower():
                    raw.append(f"{module.name}:{node.lineno}")
            if isinstance(node, (ast.Import, ast.ImportFrom)):
                names = [a.name for a in node.names] + [getattr(node, "module", None) or ""]
                if "subprocess" in names:
                    raw.append(f"{module.name}:{node.lineno} imports subprocess")
    assert raw == []
    assert patches.COMMIT_PATCH_ARGS is diff.COMMIT_PATCH_ARGS and patches.read_hunks is diff.read_hunks


# -- the record end to end: real hooks, a real push, then the audit -------------------------------------------

LABELS = '"""Parcel labels."""\n\n\ndef label(name):\n    return name.upper()\n'
TEST_LABELS = 'from parcelkit.labels import label\n\n\ndef test_label():\n    assert label("a") == "A"\n'
LAUNCH = 'import os\n\n\ndef launch(label):\n    return os.system("lp " + label)\n'  # calls.banned: a shell


def _git(cwd: Path, *args: str, env: dict | None = None, message: str | None = None) -> subprocess.CompletedProcess:
    """A real git command; the hooks it runs find the verifier themselves (no PYTHONPATH)."""
    import os

    from verifier.demo.scratch import IDENTITY

    clean = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "VERIFIER_SKIP", "VERIFIER_BYPASS")}
    return subprocess.run(
        ["git", *args], cwd=cwd, capture_output=True, text=True, input=message, env={**clean, **IDENTITY, **(env or {})}
    )


def _hooked_repo(tmp_path: Path) -> ScratchRepo:
    from tests.conftest import test_sandbox
    from verifier.demo import scenario as demo

    repo = ScratchRepo(tmp_path / "repo")
    base_files = {"parcelkit/__init__.py": "", "parcelkit/rates.py": demo.RATES, "tests/test_rates.py": demo.TEST_RATES}
    repo.commit("Start parcelkit", base_files)
    repo.git("config", "verifier.sandbox", test_sandbox())
    installed = subprocess.run(
        [sys.executable, "-m", "verifier", "-C", str(repo.path), "hooks", "install"],
        capture_output=True,
        text=True,
        env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"},
    )
    assert installed.returncode == 0, installed.stderr
    remote = tmp_path / "remote.git"
    subprocess.run(["git", "init", "-q", "--bare", str(remote)], check=True)
    repo.git("remote", "add", "origin", str(remote))
    assert _git(repo.path, "push", "-q", "origin", "main").returncode == 0  # a person's history: nothing to run
    return repo


def _commit_all(repo: ScratchRepo, files: dict[str, str], message: str, *extra: str, env: dict | None = None) -> str:
    repo.write(files)
    repo.git("add", "-A")
    done = _git(repo.path, "commit", "-q", *extra, "-F", "-", env=env, message=message)
    assert done.returncode == 0, done.stderr
    return repo.head()


def _window() -> AuditRequest:
    from datetime import date, timedelta

    today = date.today()
    since, until = (today - timedelta(days=1)).isoformat(), (today + timedelta(days=1)).isoformat()
    return AuditRequest(since=since, until=until, ref="feature", weeks=0)


def test_the_record_through_real_hooks_and_a_push_then_the_audit(tmp_path: Path):
    """A commit skipped at commit time, a person's commit, a push that passes them; a clean commit checked by
    the commit hook, a commit with a banned call that bypassed it, and a refused push of the range of both.
    Then the audit: each commit judged by its own lines, each finding counted once, the skip still shown."""
    from verifier.demo import scenario as demo

    repo = _hooked_repo(tmp_path)
    repo.git("checkout", "-q", "-b", "feature")
    skipped = _commit_all(
        repo, {"parcelkit/labels.py": LABELS, "tests/test_labels.py": TEST_LABELS}, machine("Labels, in a hurry"),
        env={"VERIFIER_BYPASS": "the label printer demo starts now"},
    )  # fmt: skip
    person = _commit_all(repo, {"README.md": "# parcelkit\n"}, "Readme")
    first_push = _git(repo.path, "push", "-q", "origin", "feature")
    assert first_push.returncode == 0, first_push.stderr
    clean = _commit_all(
        repo, {"parcelkit/volume.py": demo.VOLUME, "tests/test_volume.py": demo.TEST_VOLUME}, machine("Add volume")
    )
    risky = _commit_all(repo, {"parcelkit/launch.py": LAUNCH}, machine("Print labels"), "--no-verify")
    refused = _git(repo.path, "push", "-q", "origin", "feature")
    assert refused.returncode != 0 and "calls.banned" in refused.stderr

    def note(sha: str) -> dict:  # the note as git itself shows it
        return json.loads(repo.git("notes", f"--ref={NOTES}", "show", sha))

    bypass = note(skipped)["checks"][0]  # the commit hook was bypassed: its entry keeps the reason
    assert (bypass["how"], bypass["skipped"], bypass["reason"]) == (
        "commit-hook",
        True,
        "bypassed by VERIFIER_BYPASS: the label printer demo starts now",
    )
    assert [c["how"] for c in note(skipped)["checks"]] == ["commit-hook", "pre-push"]
    assert [(c["how"], c["verdict"]) for c in note(clean)["checks"]] == [("commit-hook", "pass"), ("pre-push", "pass")]
    assert note(clean)["checks"][-1]["range"]["verdict"] == "block"  # the range blocked, its clean commit did not
    assert note(risky)["checks"][-1]["verdict"] == "block"
    assert note(person)["checks"][-1]["verdict"] == "pass" and note(person)["checks"][-1]["machine_lines"] == 0

    audit = run_audit(repo.path, _window())
    rows = {r.sha: r for r in audit.commits}
    marked = repo.git("log", "--format=%H", "-E", "--grep=^Model-Written:", "feature").split()  # git's own grep
    assert set(rows) == set(marked) == {skipped, clean, risky}
    assert audit.window.commits == int(repo.git("rev-list", "--count", "feature").strip())
    assert (rows[skipped].status, rows[skipped].at_commit, rows[skipped].checks) == ("pass", "skipped", 2)
    assert (rows[clean].status, rows[clean].at_commit, rows[clean].checks) == ("pass", "checked", 2)
    assert (rows[risky].status, rows[risky].at_commit) == ("blocked-merged", "skipped")
    w = audit.window
    assert (w.verified, w.passed, w.unverified, w.blocked_merged, w.skipped_at_commit) == (3, 2, 0, 1, 2)

    newest = {sha: note(sha)["checks"][-1] for sha in marked}
    own = sum(len(entry["findings"]) for entry in newest.values())
    facts = {json.dumps(f, sort_keys=True) for e in newest.values() for f in e["range"]["findings"]}
    assert sum(n for _rule, _severity, n in audit.findings_by_rule) == own + len(facts)
    banned = [n for rule, _severity, n in audit.findings_by_rule if rule == "calls.banned"]
    shell_lines = repo.git("grep", "-n", "os.system", risky, "--", "parcelkit/").splitlines()  # git grep
    assert banned == [len(shell_lines)] == [1]
    assert rows[clean].findings == () and rows[skipped].findings == ()


def test_every_format_says_checked_and_passed_apart(tmp_path: Path):
    repo = _hooked_repo(tmp_path)
    repo.git("checkout", "-q", "-b", "feature")
    skipped = _commit_all(
        repo, {"parcelkit/labels.py": LABELS, "tests/test_labels.py": TEST_LABELS}, machine("Labels, in a hurry"),
        env={"VERIFIER_BYPASS": "the label printer demo starts now"},
    )  # fmt: skip
    assert _git(repo.path, "push", "-q", "origin", "feature").returncode == 0  # the pre-push check passes it
    risky = _commit_all(repo, {"parcelkit/launch.py": LAUNCH}, machine("Print labels"), "--no-verify")
    assert _git(repo.path, "push", "-q", "origin", "feature").returncode != 0
    window = _window()
    out = tmp_path / "out"
    done = run_audit_cli(
        repo, "--ref", "feature", "--since", str(window.since), "--until", str(window.until), "--weeks", "0",
        "--format", "all", "--output", str(out),
    )  # fmt: skip
    assert done.returncode == 0, done.stderr
    report = json.loads((out / "audit.json").read_text())
    assert {k: report["totals"][k] for k in ("checked", "passed", "skipped_at_commit_time", "blocked_merged")} == {
        "checked": 2,
        "passed": 1,
        "skipped_at_commit_time": 2,
        "blocked_merged": 1,
    }
    by_sha = {c["sha"]: c for c in report["commits"]}
    assert (by_sha[skipped]["checked"], by_sha[skipped]["passed"], by_sha[skipped]["at_commit_time"]) == (
        True,
        True,
        "skipped",
    )
    assert (by_sha[risky]["checked"], by_sha[risky]["passed"]) == (True, False)
    assert {"checked", "passed", "skipped at commit time"} <= set(report["definitions"])
    rows = {r["sha"]: r for r in csv.DictReader(io.StringIO((out / "audit.csv").read_text()))}  # Python's csv
    assert (rows[skipped]["checked"], rows[skipped]["passed"], rows[skipped]["at_commit_time"]) == (
        "yes",
        "yes",
        "skipped",
    )
    assert (rows[risky]["checked"], rows[risky]["passed"]) == ("yes", "no")
    summary = (out / "audit.md").read_text()
    assert "checked by the gate: 2 of 2" in summary and "passed: 1 of 2" in summary
    assert "2 skipped at commit time" in summary and "**passed**:" in summary
    page = (out / "audit.html").read_text()
    assert "skipped at commit time" in page and "<th>passed</th>" in page and "<th>checked</th>" in page


def _entry(verdict: str, how: str, own=(), facts=(), waivers=(), checked_at="2024-03-06T00:00:00Z", head="") -> dict:
    scope = {"base": "b", "head": head, "commits": 2, "verdict": "block", "findings": list(facts)}
    return {"checked_at": checked_at, "how": how, "skipped": False, "verdict": verdict, "findings": list(own),
            "waivers": list(waivers), "range": scope}  # fmt: skip


def test_a_range_fact_and_a_waiver_count_once_and_the_newest_check_decides(tmp_path: Path):
    from verifier.report import notes

    repo = ScratchRepo(tmp_path / "repo")
    repo.commit("Start", {"parcelkit/rates.py": _lines("rate", 2)}, date=_date("03-01"))
    first = repo.commit(machine("Zones"), {"parcelkit/zones.py": _lines("zone", 3)}, date=_date("03-05"))
    second = repo.commit(machine("Labels"), {"parcelkit/labels.py": _lines("label", 3)}, date=_date("03-05", 13))
    third = repo.commit(machine("Track"), {"parcelkit/track.py": _lines("track", 2)}, date=_date("03-05", 14))
    fourth = repo.commit(machine("Util"), {"parcelkit/util.py": _lines("util", 2)}, date=_date("03-05", 15))
    fact = {"rule": "tests.failing", "severity": "block", "path": "tests/t.py", "line": None, "message": "failed"}
    own = {"rule": "calls.banned", "severity": "block", "path": "parcelkit/labels.py", "line": 2, "message": "shell"}
    waiver = {"rule": "tests.failing", "path": "**", "reason": "flaky host", "owner": "ada", "expires": "2024-04-01"}
    ranged = {"facts": [fact], "waivers": [waiver], "head": second}  # one check of the range first..second
    bodies = {
        first: [_entry("pass", "commit-hook", head=first), _entry("block", "pre-push", **ranged)],
        second: [_entry("block", "pre-push", own=[own], **ranged)],
        third: [_entry("block", "commit-hook", head=third), _entry("pass", "ci", checked_at="2024-03-07T00:00:00Z")],
        fourth: [_entry("pass", "commit-hook", head=fourth), notes.skipped_entry("pre-push", "bypassed: hotfix")],
    }
    for sha, entries in bodies.items():
        body = None
        for entry in entries:
            body = notes.appended(body, sha, entry)
        repo.git("notes", f"--ref={NOTES}", "add", "-m", json.dumps(body), sha)
    audit = run_audit(repo.path, AuditRequest(since="2024-03-04", until="2024-03-10", weeks=0))
    rows = {r.sha: r for r in audit.commits}
    assert (rows[first].status, rows[first].at_commit, rows[first].checks) == ("blocked-merged", "checked", 2)
    assert rows[second].status == "blocked-merged" and rows[second].findings == (own,)
    assert (rows[third].status, rows[third].checked_how) == ("pass", "ci")  # the newest check decides
    assert rows[fourth].status == "unverified" and rows[fourth].at_commit == "checked"  # skipped at push time
    assert "skipped" in (rows[fourth].note_problem or "")
    # the failing test of the one range check is recorded on both of its commits: counted once; the banned
    # call on the second commit's line once
    assert dict(((r, s), n) for r, s, n in audit.findings_by_rule) == {
        ("calls.banned", "block"): 1,
        ("tests.failing", "block"): 1,
    }
    assert audit.waivers_by_rule == (("tests.failing", 1),)
