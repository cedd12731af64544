"""The audit's HTML page: self-contained, charts drawn by matplotlib, and it renders in headless Chromium
with its script running and no script error."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from tests.conftest import ROOT
from tests.test_audit import AGENT_IDENTITY, history  # noqa: F401  (the module-scoped history fixture)

CHROMIUM_FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
)


def _chromium() -> str:
    found = shutil.which("chromium")
    if found is None:
        if os.environ.get("VERIFIER_REQUIRE_CHROMIUM") == "1":
            pytest.fail("chromium is required here but not installed (.ci/chromium-up installs it)")
        pytest.skip("chromium is not installed (apt-get install -y chromium)")
    return found


@pytest.fixture(scope="module")
def rendered(history, tmp_path_factory: pytest.TempPathFactory) -> str:  # noqa: F811
    """The page, rendered once by the real command line."""
    repo, _c = history
    target = tmp_path_factory.mktemp("html") / "audit.html"
    done = subprocess.run(
        [
            sys.executable,
            "-m",
            "verifier",
            "-C",
            str(repo.path),
            "audit",
            "--since",
            "2024-03-04",
            "--until",
            "2024-03-10",
            "--weeks",
            "2",
            "--agent-email",
            AGENT_IDENTITY[1],
            "--format",
            "html",
            "--output",
            str(target),
        ],
        capture_output=True,
        text=True,
        env={**os.environ, "PYTHONPATH": str(ROOT)},
        check=False,
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


def test_page_is_self_contained_and_linked(rendered: str):
    text = rendered
    assert len(re.findall(r'<figure class="chart" id="chart-[a-z-]+"><svg', text)) == 2
    assert "<link" not in text and "<script src" not in text and "<img" not in text
    links = set(re.findall(r'href="#(findings-[0-9a-f]{40})"', text))
    anchors = set(re.findall(r'id="(findings-[0-9a-f]{40})"', text))
    assert len(links) == 6 and links <= anchors


def test_page_renders_in_chromium(rendered: str, tmp_path: Path):
    chromium = _chromium()
    page = _page(rendered, tmp_path)
    dom = _dump_dom(chromium, page, tmp_path / "profile")
    root = re.search(r"<html[^>]*>", dom)
    assert root is not None
    assert 'data-audit-ready="1"' in root.group(0), root.group(0)
    assert "data-audit-error" not in root.group(0)
    assert 'data-audit-charts="2"' in root.group(0)  # the script counted the charts' SVG elements
    assert dom.count("<svg") >= 2


def test_a_script_error_is_caught_by_the_marker(rendered: str, tmp_path: Path):
    """The error marker works: the same page with a broken script reports the error."""
    chromium = _chromium()
    page = _page(rendered.replace("</body>", "<script>notDefinedAnywhere();</script></body>"), tmp_path)
    root = re.search(r"<html[^>]*>", _dump_dom(chromium, page, tmp_path / "profile"))
    assert root is not None and "data-audit-error" in root.group(0) and "notDefinedAnywhere" in root.group(0)
