"""The audit's mutants per agent and week, from notes that real ``verifier check`` runs wrote.

Real git repositories with fixed commit dates, the real CLI (real pytest, real coverage, the real mutation
stage) writing the notes, then ``verifier audit`` read in every format. The numbers are checked against
something the audit does not compute: each check's own JSON report (``mutation``: killed, survived,
accepted, score), and git's own note reader (``git notes show``) for what a note holds.
"""

from __future__ import annotations

import csv
import html
import io
import json
import re
from pathlib import Path

import pytest

from tests.conftest import machine, run_audit_cli, run_check
from verifier.demo.scratch import ScratchRepo

NOTES = "refs/notes/verifier"
QUILL = "quill-assist/2.3"
TERN = "tern-coder/1.4"
ELDER = "ledger-helper/0.9"  # only ever checked by a verifier that wrote format-1 notes (no mutant counts)
WINDOW = ("--since", "2024-03-04", "--until", "2024-03-10", "--weeks", "1")

# a team accepts the survivors of the weak commit's last line (a human's waiver, read from the trusted base)
WAIVER = (
    "version: 1\n"
    "waivers:\n  - rule: tests.mutant-survived\n    path: freight/pallet.py:7\n"
    "    reason: no surcharge and a zero surcharge mean the same to the invoice\n"
    "    owner: mira.santos\n    expires: 2099-12-31\n"
)
START = {
    "verifier.yaml": WAIVER,
    "freight/__init__.py": "",
    "tests/__init__.py": "",
    "tests/test_start.py": "def test_start():\n    assert 2 * 2 == 4\n",
}


def _function(name: str) -> str:
    return (
        f"def {name}(weight, express):\n"
        f'    """The surcharge in cents on a parcel of ``weight`` grams."""\n'
        "    if weight >= 100 and express:\n"
        "        return weight // 10\n"
        "    if weight >= 100:\n"
        "        return weight // 20\n"
        "    return 0\n"
    )


def _weak_test(module: str, name: str) -> str:
    """Calls every branch and asserts nothing: full coverage, surviving mutants."""
    return (
        f"from freight.{module} import {name}\n\n\n"
        f"def test_{name}_runs():\n    {name}(200, True)\n    {name}(200, False)\n    {name}(50, False)\n"
    )


def _strong_test(module: str, name: str) -> str:
    cases = "[(100, True, 10), (99, True, 0), (100, False, 5), (99, False, 0), (200, True, 20), (200, False, 10)]"
    return (
        f"import pytest\n\nfrom freight.{module} import {name}\n\n\n"
        f'@pytest.mark.parametrize("weight, express, expected", {cases})\n'
        f"def test_{name}(weight, express, expected):\n    assert {name}(weight, express) == expected\n"
    )


def _files(module: str, name: str, strong: bool) -> dict[str, str]:
    test = _strong_test(module, name) if strong else _weak_test(module, name)
    return {f"freight/{module}.py": _function(name), f"tests/test_{module}.py": test}


def _date(day: str, hour: int = 12) -> str:
    return f"2024-{day}T{hour:02d}:00:00+0000"


def _checked(repo: ScratchRepo, spec: str = "HEAD") -> dict:
    """Run the real gate on ``spec`` (it writes the notes); return the counts of its own JSON report."""
    out = run_check(repo, spec)
    assert out.report is not None and out.code in (0, 1), out.stderr + out.stdout
    counts = out.report["mutation"]
    assert counts is not None and counts["total"] > 0, "the mutation stage did not run"
    return counts


def _old_note(repo: ScratchRepo, sha: str) -> None:
    """A format-1 note, as an older verifier wrote it: a verdict and coverage, no mutant counts."""
    body = {"format": 1, "tool": "verifier", "version": "0.1.0", "checked_at": "2024-03-08T00:00:00Z",
            "commit": sha, "range": {"base": None, "head": sha}, "verdict": "pass", "agent": ELDER,
            "machine_lines": 7, "coverage": {"executable": 4, "covered": 4, "percent": 100.0},
            "tests": {"run": 3, "failed": 0}, "findings": [], "waivers": [], "sandbox": "namespace"}  # fmt: skip
    repo.git("notes", f"--ref={NOTES}", "add", "-m", json.dumps(body), sha)


def _table_rows(page: str, first_heading: str) -> list[list[str]]:
    """The body rows (cell texts) of the page's table whose first heading is ``first_heading``."""
    from html.parser import HTMLParser

    class Tables(HTMLParser):
        def __init__(self) -> None:
            super().__init__()
            self.tables: list[list[list[str]]] = []
            self.cell: list[str] | None = None

        def handle_starttag(self, tag: str, attrs: object) -> None:
            if tag == "table":
                self.tables.append([])
            elif tag == "tr":
                self.tables[-1].append([])
            elif tag in ("td", "th"):
                self.cell = []

        def handle_endtag(self, tag: str) -> None:
            if tag in ("td", "th") and self.cell is not None:
                self.tables[-1][-1].append("".join(self.cell).strip())
                self.cell = None

        def handle_data(self, data: str) -> None:
            if self.cell is not None:
                self.cell.append(data)

    reader = Tables()
    reader.feed(page)
    found = [t for t in reader.tables if t and t[0] and t[0][0] == first_heading]
    assert len(found) == 1, f"{len(found)} tables headed {first_heading!r}"
    return found[0][1:]


def _expected(counts: dict) -> dict:
    return {k: counts[k] for k in ("killed", "survived", "accepted", "score")}


def _shown(mutants: dict | None) -> dict | None:
    return None if mutants is None else {k: mutants[k] for k in ("killed", "survived", "accepted", "score")}


@pytest.fixture(scope="module")
def checked(tmp_path_factory: pytest.TempPathFactory) -> tuple[ScratchRepo, dict[str, str], dict[str, dict]]:
    """Tidewater Freight's surcharges: the trend week before the window, quill-assist with strong tests;
    in the window, quill-assist with assertion-free tests (survivors), tern-coder with strong tests, and
    a commit of ledger-helper that only an older verifier checked. Each checked by a real commit check."""
    repo = ScratchRepo(tmp_path_factory.mktemp("audit-mutation") / "repo")
    repo.commit("Start the freight tables", START, date=_date("02-20"))
    c: dict[str, str] = {}
    counts: dict[str, dict] = {}
    for key, day, agent, module, strong in (
        ("early", "02-27", QUILL, "parcel", True),
        ("weak", "03-05", QUILL, "pallet", False),
        ("strong", "03-06", TERN, "crate", True),
    ):
        c[key] = repo.commit(machine(f"Add the {module} surcharge", agent), _files(module, module, strong), _date(day))
        counts[key] = _checked(repo)
    c["old"] = repo.commit(machine("Add the drum surcharge", ELDER), _files("drum", "drum", True), date=_date("03-07"))
    _old_note(repo, c["old"])
    return repo, c, counts


def _audit_json(repo: ScratchRepo) -> dict:
    done = run_audit_cli(repo, *WINDOW, "--format", "json", "--no-cache")
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout)


def test_the_notes_carry_the_counts_of_the_checks_own_report(checked):
    repo, c, counts = checked
    for key in ("early", "weak", "strong"):
        note = json.loads(repo.git("notes", f"--ref={NOTES}", "show", c[key]))  # git's own note reader
        assert _shown(note["checks"][-1]["mutants"]) == _expected(counts[key])
    assert counts["weak"]["survived"] > 0 and counts["weak"]["score"] < 80  # the assistant's weak tests
    assert counts["weak"]["accepted"] >= 1  # the waived line's survivors
    assert counts["strong"]["score"] >= 80 and counts["early"]["score"] >= 80


def test_per_agent_and_week_the_audit_equals_each_checks_report(checked):
    repo, c, counts = checked
    report = _audit_json(repo)
    weeks = {(w["since"][:10], w["agent"]): w for w in report["mutation"]}
    assert set(weeks) == {("2024-02-26", QUILL), ("2024-03-04", QUILL), ("2024-03-04", TERN), ("2024-03-04", ELDER)}
    assert _shown(weeks[("2024-02-26", QUILL)]["mutants"]) == _expected(counts["early"])
    assert _shown(weeks[("2024-03-04", QUILL)]["mutants"]) == _expected(counts["weak"])  # the survivors show
    assert _shown(weeks[("2024-03-04", TERN)]["mutants"]) == _expected(counts["strong"])
    window = report["totals"]["mutants"]
    assert window["killed"] == counts["weak"]["killed"] + counts["strong"]["killed"]
    assert window["survived"] == counts["weak"]["survived"] + counts["strong"]["survived"]
    assert window["accepted"] == counts["weak"]["accepted"] + counts["strong"]["accepted"]
    assert window["checks"] == 2 and report["totals"]["mutation_no_data"] == 1
    assert report["trend"][-1]["mutants"] == window  # the trend's last period is the window
    assert _shown(report["trend"][0]["mutants"]) == _expected(counts["early"])
    rows = {r["sha"]: r for r in report["commits"]}
    assert _shown(rows[c["weak"]]["mutants"]) == _expected(counts["weak"]) and rows[c["weak"]]["mutants"]["counted"]


def test_an_old_note_without_counts_is_no_data_never_zero_survivors(checked):
    repo, c, _counts = checked
    out = Path(repo.path.parent / "formats")
    done = run_audit_cli(repo, *WINDOW, "--format", "all", "--output", str(out), "--no-cache")
    assert done.returncode == 0, done.stderr
    report = json.loads((out / "audit.json").read_text())
    elder = next(w for w in report["mutation"] if w["agent"] == ELDER)
    assert (elder["commits"], elder["with_data"], elder["no_data"], elder["mutants"]) == (1, 0, 1, None)
    old = next(r for r in report["commits"] if r["sha"] == c["old"])
    assert old["status"] == "pass" and old["mutants"] is None  # checked, but by a verifier without mutants
    rows = {r["sha"]: r for r in csv.DictReader(io.StringIO((out / "audit.csv").read_text()))}  # Python's reader
    assert [rows[c["old"]][k] for k in ("mutants_killed", "mutants_survived", "mutation_score")] == ["", "", ""]
    assert rows[c["weak"]]["mutants_survived"] not in ("", "0") and rows[c["weak"]]["mutants_counted"] == "yes"
    summary = (out / "audit.md").read_text()
    assert f"| 2024-03-04 | {ELDER} | 1 | 1 | n/a | n/a | n/a | n/a |" in summary
    assert "1 machine commit without mutation data" in summary
    page = (out / "audit.html").read_text()
    assert "<h2>Mutants by agent and week</h2>" in page and page.count('<figure class="chart" id="chart-mutation-') == 2
    table = _table_rows(page, "week from")  # read back with Python's HTML parser
    assert [r for r in table if r[:2] == ["2024-03-04", ELDER]] == [["2024-03-04", ELDER, "1", "1", *["n/a"] * 4]]
    weak = _expected(_counts["weak"])
    assert ["2024-03-04", QUILL, "1", "0", *(str(weak[k]) for k in ("killed", "survived", "accepted"))] in [
        r[:7] for r in table
    ]
    assert f"{QUILL}: {weak['score']:g}%" in page  # the weak week's bar in the window's chart, its tooltip


def test_a_range_checks_counts_are_counted_once_on_its_head(tmp_path: Path):
    """One pre-push style check of two commits by two agents: each note holds the whole change's counts;
    the audit counts them once, on the head commit, instead of once per commit."""
    repo = ScratchRepo(tmp_path / "repo")
    repo.commit("Start the freight tables", START, date=_date("03-01"))
    first = repo.commit(machine("Add the parcel surcharge", QUILL), _files("parcel", "parcel", True), _date("03-05"))
    head = repo.commit(machine("Add the pallet surcharge", TERN), _files("pallet", "pallet", False), _date("03-06"))
    counts = _checked(repo, "HEAD~2..HEAD")
    for sha in (first, head):  # git's reader: the same change-wide counts on both commits
        assert _shown(json.loads(repo.git("notes", f"--ref={NOTES}", "show", sha))["checks"][-1]["mutants"]) == (
            _expected(counts)
        )
    report = _audit_json(repo)
    assert _shown(report["totals"]["mutants"]) == _expected(counts) and report["totals"]["mutants"]["checks"] == 1
    weeks = {w["agent"]: w for w in report["mutation"] if w["since"].startswith("2024-03-04")}
    assert _shown(weeks[TERN]["mutants"]) == _expected(counts)
    assert weeks[QUILL]["with_data"] == 1 and weeks[QUILL]["mutants"]["checks"] == 0  # counted on the head
    rows = {r["sha"]: r for r in report["commits"]}
    assert (rows[first]["mutants"]["counted"], rows[head]["mutants"]["counted"]) == (False, True)


def test_counts_that_are_not_counts_are_no_data(tmp_path: Path):
    """A note someone wrote by hand with booleans and text where the counts go: no data, not a score."""
    from verifier.report import notes

    repo = ScratchRepo(tmp_path / "repo")
    repo.commit("Start the freight tables", START, date=_date("03-01"))
    sha = repo.commit(machine("Add the parcel surcharge", QUILL), _files("parcel", "parcel", False), _date("03-05"))
    entry = {"checked_at": "2024-03-05T13:00:00Z", "how": "ci", "skipped": False, "verdict": "pass", "findings": [],
             "waivers": [], "range": {"base": None, "head": sha, "commits": 1, "verdict": "pass", "findings": []},
             "mutants": {"killed": True, "survived": "0", "accepted": 0, "score": 100.0}}  # fmt: skip
    repo.git("notes", f"--ref={NOTES}", "add", "-m", json.dumps(notes.appended(None, sha, entry)), sha)
    report = _audit_json(repo)
    assert report["totals"]["mutants"] is None and report["totals"]["mutation_no_data"] == 1
    assert report["commits"][0]["mutants"] is None and report["commits"][0]["status"] == "pass"


def test_the_page_with_mutation_charts_renders_in_chromium(checked, tmp_path: Path):
    from tests.test_audit_html import _chromium, _dump_dom, _root

    chromium = _chromium()
    repo, _c, _counts = checked
    page = tmp_path / "audit.html"
    done = run_audit_cli(repo, *WINDOW, "--format", "html", "--output", str(page))
    assert done.returncode == 0, done.stderr
    root = _root(_dump_dom(chromium, page, tmp_path / "profile"))
    assert 'data-audit-ready="1"' in root and "data-audit-error" not in root, root
    assert 'data-audit-charts="4"' in root  # the two trend charts and one per week with mutation data


def test_an_agent_name_with_markup_is_escaped_in_the_mutation_table_and_chart(tmp_path: Path):
    """The agent comes from the commit's trailer, which anyone writes: in the page it is text, never markup."""
    from verifier.report import notes

    hostile = "<script>document.documentElement.setAttribute('data-injected','1')</script>"
    repo = ScratchRepo(tmp_path / "repo")
    repo.commit("Start the freight tables", START, date=_date("03-01"))
    sha = repo.commit(machine("Add the parcel surcharge", hostile), _files("parcel", "parcel", True), _date("03-05"))
    entry = {"checked_at": "2024-03-05T13:00:00Z", "how": "ci", "skipped": False, "verdict": "pass", "findings": [],
             "waivers": [], "range": {"base": None, "head": sha, "commits": 1, "verdict": "pass", "findings": []},
             "mutants": {"killed": 3, "survived": 1, "accepted": 0, "score": 75.0}}  # fmt: skip
    repo.git("notes", f"--ref={NOTES}", "add", "-m", json.dumps(notes.appended(None, sha, entry)), sha)
    page_file = tmp_path / "audit.html"
    done = run_audit_cli(repo, *WINDOW, "--format", "html", "--output", str(page_file))
    assert done.returncode == 0, done.stderr
    page = page_file.read_text()
    assert hostile not in page and "&lt;script&gt;document" in page
    assert _table_rows(page, "week from") == [["2024-03-04", hostile, "1", "0", "3", "1", "0", "75%"]]
    chart = page.split('<figure class="chart" id="chart-mutation-2024-03-04">', 1)[1].split("</figure>", 1)[0]
    bar = re.search(r'<g class="bar"><title>(.*?)</title>', chart)
    assert bar is not None and html.unescape(bar.group(1)) == f"{hostile}: 75%"  # Python's own unescaping
