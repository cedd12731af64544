"""The audit's HTML page: a jinja2 template with charts of our own (inline SVG), self-contained, every value
from the repository escaped, and it renders in headless Chromium with its script running and no script
error. matplotlib is no longer needed anywhere: ``--format all`` and the README's audit line work without it."""

from __future__ import annotations

import ast
import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from tests.conftest import ROOT, machine, run_audit_cli
from tests.test_audit import AGENT_IDENTITY, NOTES, _date, _entry, _lines, history  # noqa: F401  (the fixture)
from verifier.demo.scratch import ScratchRepo
from verifier.report import notes

CHROMIUM_FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
)
WINDOW_ARGS = ("--since", "2024-03-04", "--until", "2024-03-10", "--weeks", "2", "--agent-email", AGENT_IDENTITY[1])
# A payload that, if it ran, marks the page's root element; the page's own script never sets this attribute.
PAYLOAD = "<script>document.documentElement.setAttribute('data-injected','1')</script>"
# git drops angle brackets from a name (seen with git 2.x: an identity cannot hold them), so the name tries
# to break out of an attribute or start an entity instead
NAME = 'Mallory" onclick="x&amp'


def _chromium() -> str:
    found = shutil.which("chromium")
    if found is None:
        if os.environ.get("VERIFIER_REQUIRE_CHROMIUM") == "1":
            pytest.fail("chromium is required here but not installed (.ci/chromium-up installs it)")
        pytest.skip("chromium is not installed (apt-get install -y chromium)")
    return found


def _without_matplotlib(tmp_path: Path) -> dict[str, str]:
    """An environment where ``import matplotlib`` fails whether or not it is installed: a package of that
    name ahead of everything on the path that raises ImportError (Python's import system takes the first
    match on sys.path, docs.python.org, "The import system")."""
    shadow = tmp_path / "shadow" / "matplotlib"
    shadow.mkdir(parents=True)
    (shadow / "__init__.py").write_text("raise ImportError('matplotlib is not installed here')\n")
    return {"PYTHONPATH": f"{shadow.parent}{os.pathsep}{ROOT}"}


@pytest.fixture(scope="module")
def rendered(history, tmp_path_factory: pytest.TempPathFactory) -> str:  # noqa: F811
    """The page, rendered once by the real command line, where matplotlib cannot be imported."""
    repo, _c = history
    folder = tmp_path_factory.mktemp("html")
    target = folder / "audit.html"
    done = run_audit_cli(
        repo, *WINDOW_ARGS, "--format", "html", "--output", str(target), env=_without_matplotlib(folder)
    )
    assert done.returncode == 0, done.stderr
    return target.read_text()


def _page(text: str, tmp_path: Path) -> Path:
    page = tmp_path / "audit.html"
    page.write_text(text)
    return page


def _dump_dom(chromium: str, page: Path, profile: Path) -> str:
    done = subprocess.run(
        [chromium, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", "--dump-dom", page.as_uri()],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert done.returncode == 0, done.stderr[-2000:]
    return done.stdout


def _root(dom: str) -> str:
    root = re.search(r"<html[^>]*>", dom)
    assert root is not None
    return root.group(0)


def test_page_is_self_contained_and_linked(rendered: str):
    text = rendered
    assert len(re.findall(r'<figure class="chart" id="chart-[a-z-]+"><svg', text)) == 2
    assert "<link" not in text and "<script src" not in text and "<img" not in text
    # nothing fetched: no src or href to another document, no CSS url() or @import (the SVG namespace
    # attribute names the namespace, it loads nothing)
    assert " src=" not in text and "url(" not in text and "@import" not in text
    assert re.findall(r'href="(?!#)', text) == []
    links = set(re.findall(r'href="#(findings-[0-9a-f]{40})"', text))
    anchors = set(re.findall(r'id="(findings-[0-9a-f]{40})"', text))
    assert len(links) == 6 and links <= anchors


def test_the_bars_show_the_trend_the_json_report_gives(history, rendered: str):  # noqa: F811
    """Each bar's height is its week's value on the 0-100 scale, and the values are the JSON report's."""
    repo, _c = history
    done = run_audit_cli(repo, *WINDOW_ARGS, "--format", "json")
    assert done.returncode == 0, done.stderr
    trend = json.loads(done.stdout)["trend"]
    assert len(trend) == 3
    for chart_id, key in (("chart-machine-share", "machine_share"), ("chart-verified-share", "verified_share")):
        figure = re.search(rf'<figure class="chart" id="{chart_id}">(.*?)</figure>', rendered, re.DOTALL)
        assert figure is not None
        grid = [float(y) for y in re.findall(r'<line class="grid"[^>]* y1="([0-9.]+)"', figure.group(1))]
        plot_height = max(grid) - min(grid)  # from the 0 line to the 100 line
        bars = re.findall(r'<title>([0-9-]+): ([^<]+)</title>\s*<rect [^>]*height="([0-9.]+)"', figure.group(1))
        assert [label for label, _text, _h in bars] == [week["since"][5:10] for week in trend]
        for (_label, text, height), week in zip(bars, trend, strict=True):
            value = week[key]
            assert text == ("n/a" if value is None else f"{value:g}%")
            assert float(height) == pytest.approx(plot_height * (value or 0) / 100, abs=0.01)


def test_page_renders_in_chromium(rendered: str, tmp_path: Path):
    chromium = _chromium()
    page = _page(rendered, tmp_path)
    dom = _dump_dom(chromium, page, tmp_path / "profile")
    root = _root(dom)
    assert 'data-audit-ready="1"' in root, root
    assert "data-audit-error" not in root
    assert 'data-audit-charts="2"' in root  # the script counted the charts' SVG elements
    assert dom.count("<svg") >= 2


def test_a_script_error_is_caught_by_the_marker(rendered: str, tmp_path: Path):
    """The error marker works: the same page with a broken script reports the error."""
    chromium = _chromium()
    page = _page(rendered.replace("</body>", "<script>notDefinedAnywhere();</script></body>"), tmp_path)
    root = _root(_dump_dom(chromium, page, tmp_path / "profile"))
    assert "data-audit-error" in root and "notDefinedAnywhere" in root


def test_the_payload_runs_when_it_is_not_escaped(rendered: str, tmp_path: Path):
    """The injection check below can fail: the same payload pasted raw into the page does run."""
    chromium = _chromium()
    page = _page(rendered.replace("</body>", PAYLOAD + "</body>"), tmp_path)
    assert 'data-injected="1"' in _root(_dump_dom(chromium, page, tmp_path / "profile"))


@pytest.fixture(scope="module")
def hostile(tmp_path_factory: pytest.TempPathFactory) -> tuple[str, str]:
    """An assistant's commit whose subject, committer name, agent name and gate-note finding carry markup
    (the committer's name a quote and an entity);
    returns the page and the commit's sha."""
    folder = tmp_path_factory.mktemp("hostile")
    repo = ScratchRepo(folder / "repo")
    repo.commit("Start", {"parcelkit/rates.py": _lines("rate", 2)}, date=_date("03-01"))
    repo.write({"parcelkit/zones.py": _lines("zone", 3)})
    repo.git("add", "-A")
    dated = {"GIT_AUTHOR_DATE": _date("03-05"), "GIT_COMMITTER_DATE": _date("03-05")}
    message = machine(f"Zones {PAYLOAD}", agent="quill-assist/<b>2.3</b>")
    repo.git("commit", "-q", "-F", "-", env={**dated, "GIT_COMMITTER_NAME": NAME}, input=message.encode())
    sha = repo.head()
    finding = {"rule": "calls.banned", "severity": "block", "path": f"x{PAYLOAD}.py", "line": 1, "message": PAYLOAD}
    entry = _entry("block", "commit-hook", own=[finding], facts=[{**finding, "path": None}], head=sha)
    repo.git("notes", f"--ref={NOTES}", "add", "-m", json.dumps(notes.appended(None, sha, entry)), sha)
    target = folder / "audit.html"
    done = run_audit_cli(repo, "--since", "2024-03-04", "--until", "2024-03-10", "--format", "html", "--output",
                         str(target))  # fmt: skip
    assert done.returncode == 0, done.stderr
    return target.read_text(), sha


def test_markup_from_commits_and_notes_is_escaped(hostile: tuple[str, str]):
    page, sha = hostile
    assert PAYLOAD not in page and "<b>2.3</b>" not in page
    assert page.count("<script") == 1  # the page's own script alone
    escaped = "&lt;script&gt;document.documentElement.setAttribute(&#39;data-injected&#39;,&#39;1&#39;)&lt;/script&gt;"
    assert f"Zones {escaped}" in page  # the subject, shown as text (the commit table and the gate record)
    assert (
        NAME not in page
        and "Mallory&#34; onclick=&#34;x&amp;amp" in page
        and "quill-assist/&lt;b&gt;2.3&lt;/b&gt;" in page
    )
    assert f"x{escaped}.py:1 {escaped}</li>" in page  # the note's finding on the commit's lines
    assert f"(block) {escaped}</li>" in page  # and of the whole range
    assert f'id="findings-{sha}"' in page


def test_markup_from_commits_does_not_run_in_chromium(hostile: tuple[str, str], tmp_path: Path):
    page, _sha = hostile
    dom = _dump_dom(_chromium(), _page(page, tmp_path), tmp_path / "profile")
    root = _root(dom)
    assert 'data-audit-ready="1"' in root and "data-injected" not in root and "data-audit-error" not in root
    assert "Zones &lt;script&gt;" in dom  # Chromium kept it as text


def test_every_format_is_written_and_the_exit_is_zero_without_matplotlib(history, tmp_path: Path):  # noqa: F811
    """``--format all`` wrote markdown, json and csv, then the html format asked for matplotlib and the
    command exited 2; now the four files are written and the command exits 0."""
    repo, _c = history
    out = tmp_path / "out"
    done = run_audit_cli(repo, *WINDOW_ARGS, "--format", "all", "--output", str(out), env=_without_matplotlib(tmp_path))
    assert done.returncode == 0, done.stderr
    assert sorted(p.name for p in out.iterdir()) == ["audit.csv", "audit.html", "audit.json", "audit.md"]
    assert (out / "audit.html").read_text().count('<figure class="chart"') == 2
    assert done.stderr.count("verifier: wrote ") == 4


def test_the_readme_audit_line_needs_no_extra(history, tmp_path: Path):  # noqa: F811
    """The README's weekly-audit command, as written there, without matplotlib or any extra."""
    repo, _c = history
    lines = [line for line in (ROOT / "README.md").read_text().splitlines() if line.startswith("verifier audit ")]
    assert len(lines) == 1, lines
    argv = lines[0].split("#", 1)[0].split()
    assert argv[:2] == ["verifier", "audit"] and "html" in argv
    done = subprocess.run(
        [sys.executable, "-m", "verifier", "-C", str(repo.path), *argv[1:]],
        capture_output=True,
        text=True,
        cwd=tmp_path,
        env={"PATH": "/usr/bin:/bin", **_without_matplotlib(tmp_path)},
        check=False,
    )
    assert done.returncode == 0, done.stderr
    output = argv[argv.index("--output") + 1]
    assert (tmp_path / output).read_text().startswith("<!DOCTYPE html>")


def test_no_matplotlib_anywhere_and_jinja2_is_a_core_dependency():
    """The package declares what it imports: jinja2 among the core dependencies (the README's plain
    install), matplotlib in no list and imported by no module."""
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    declared = [*project["dependencies"], *(d for extra in project["optional-dependencies"].values() for d in extra)]
    names = [re.split(r"[<>=!;\[ ]", d, maxsplit=1)[0].lower() for d in declared]
    assert "jinja2" in [re.split(r"[<>=!;\[ ]", d, maxsplit=1)[0].lower() for d in project["dependencies"]]
    assert "matplotlib" not in names and "audit" not in project["optional-dependencies"]
    imported = []
    for module in (ROOT / "verifier").rglob("*.py"):
        for node in ast.walk(ast.parse(module.read_text())):
            if isinstance(node, ast.Import):
                imported += [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.module:
                imported.append(node.module)
    assert "jinja2" in imported and not [name for name in imported if name.split(".")[0] == "matplotlib"]


def test_the_commit_hook_fast_path_does_not_load_jinja2(tmp_path: Path):
    """The template engine is loaded by the html format alone, never by the commit hook."""
    message = tmp_path / "MSG"
    message.write_text("Fix a typo\n")
    probe = (
        "import sys; from verifier.cli.main import main; code = main(['hook', 'commit-msg', sys.argv[1]]); "
        "print(code, sorted(m for m in sys.modules if m.split('.')[0] in ('jinja2', 'markupsafe')))"
    )
    done = subprocess.run(
        [sys.executable, "-c", probe, str(message)],
        capture_output=True,
        text=True,
        cwd=tmp_path,
        env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"},
        check=False,
    )
    assert done.stdout.strip().splitlines()[-1] == "0 []", done.stdout + done.stderr
