"""Tests of verifier.provenance.trailers: the parser against git itself, the machine mark, and scope globs.

Source of truth for parsing: `git interpret-trailers --parse` (git 2.39 on the development machine), run on
each message with the system and global git config shut out, so the default trailer rules apply. Each
case also states the pairs we expect, so a case fails if either side drifts.
Source of truth for globs: `git ls-files -- ':(glob)<pattern>'` in a real repository.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from verifier.models import MachineMark
from verifier.provenance.trailers import MACHINE_KEY, SCOPE_KEY, machine_mark, parse_trailers, path_in_scope

GIT_ENV = {**os.environ, "GIT_CONFIG_NOSYSTEM": "1", "GIT_CONFIG_GLOBAL": os.devnull, "LC_ALL": "C"}

SOB = "Signed-off-by: Mara Quill <mara@quillfeather.example>"
DIFF = (
    "diff --git a/src/parcelkit/rates.py b/src/parcelkit/rates.py\n"
    "--- a/src/parcelkit/rates.py\n+++ b/src/parcelkit/rates.py\n"
    "@@ -1,2 +1,2 @@\n-Rate: 1\n+Rate: 2\n"
)

# (case id, message, the pairs git prints)
CASES: list[tuple[str, str, list[tuple[str, str]]]] = [
    ("single-line", "Fix rounding in parcel weight conversion", []),
    ("single-line-newline", "Fix rounding in parcel weight conversion\n", []),
    (
        "title-and-body",
        "Cache zone lookups\n\nThe zone table is read once per process now.\nThis halves label time.\n",
        [],
    ),
    (
        "trailers-after-body",
        f"Cache zone lookups\n\nThe zone table is read once per process.\n\nModel-Written: quill-assist/2.3\n{SOB}\n",
        [("Model-Written", "quill-assist/2.3"), ("Signed-off-by", "Mara Quill <mara@quillfeather.example>")],
    ),
    (
        "trailer-only-last-paragraph",
        "Bump parcelkit to 4.1\n\nModel-Written: quill-assist/2.3\n",
        [("Model-Written", "quill-assist/2.3")],
    ),
    ("title-is-never-trailers", "Model-Written: quill-assist/2.3\n", []),
    ("title-paragraph-with-trailer-lines", "Fix label margins\nModel-Written: quill-assist/2.3\n", []),
    ("leading-blank-line", "\nModel-Written: quill-assist/2.3\n", [("Model-Written", "quill-assist/2.3")]),
    (
        "continuation-lines",
        "Add rate cache\n\nModel-Written-Scope: src/parcelkit/rates/\n  tests/test_rates.py\n\tdocs/rates.md\n",
        [("Model-Written-Scope", "src/parcelkit/rates/ tests/test_rates.py docs/rates.md")],
    ),
    (
        "continuation-keeps-inner-spaces",
        "Add rate cache\n\nNote: first part   \n      second part\n",
        [("Note", "first part    second part")],
    ),
    (
        "keys-in-other-cases",
        "Add rate cache\n\nmodel-written: quill-assist/2.3\nMODEL-WRITTEN-SCOPE: docs/\n",
        [("model-written", "quill-assist/2.3"), ("MODEL-WRITTEN-SCOPE", "docs/")],
    ),
    (
        "whitespace-before-colon",
        "Add rate cache\n\nModel-Written : quill-assist/2.3\nReviewed-by\t:  Ola Fern\n",
        [("Model-Written", "quill-assist/2.3"), ("Reviewed-by", "Ola Fern")],
    ),
    (
        "comment-lines",
        "Add rate cache\n\nModel-Written: quill-assist/2.3\n# Please enter the commit message.\n"
        f"{SOB}\n# On branch main\n#\n",
        [("Model-Written", "quill-assist/2.3"), ("Signed-off-by", "Mara Quill <mara@quillfeather.example>")],
    ),
    (
        "comment-between-trailer-and-continuation",
        "Add rate cache\n\nModel-Written: quill-assist/2.3\n# note\n  more\n",
        [],
    ),
    (
        "divider-with-diff-after",
        f"Raise the rate\n\nModel-Written: quill-assist/2.4\n---\n {DIFF}",
        [("Model-Written", "quill-assist/2.4")],
    ),
    ("divider-hides-trailers", "Raise the rate\n---\n\nModel-Written: quill-assist/2.4\n", []),
    (
        "trailer-in-a-middle-paragraph",
        "Raise the rate\n\nModel-Written: quill-assist/2.4\n\nThe zone table changed.\n",
        [],
    ),
    ("dashes-without-space-are-text", "Raise the rate\n\nModel-Written: quill-assist/2.4\n---x\n", []),
    (
        "signed-off-by-with-prose-25-percent",
        f"Fix zone table\n\nThe table was stale.\nIt is rebuilt now.\nSee the ticket.\n{SOB}\n",
        [("Signed-off-by", "Mara Quill <mara@quillfeather.example>")],
    ),
    (
        "signed-off-by-with-prose-below-25-percent",
        f"Fix zone table\n\nThe table was stale.\nIt is rebuilt now.\nSee the ticket.\nThanks.\n{SOB}\n",
        [],
    ),
    (
        "trailer-with-prose-no-git-generated",
        "Fix zone table\n\nThe table was stale.\nModel-Written: quill-assist/2.3\n",
        [],
    ),
    (
        "mixed-paragraph-two-trailers",
        f"Fix zone table\n\nline one\nline two\nline three\nline four\nModel-Written: quill-assist/2.3\n{SOB}\n",
        [("Model-Written", "quill-assist/2.3"), ("Signed-off-by", "Mara Quill <mara@quillfeather.example>")],
    ),
    (
        "cherry-picked-line",
        "Fix zone table\n\n(cherry picked from commit 1a2b3c4)\nModel-Written: quill-assist/2.3\n",
        [("Model-Written", "quill-assist/2.3")],
    ),
    ("url-line", "Document the rate API\n\nhttp://x\n", [("http", "//x")]),
    (
        "url-in-trailer-paragraph",
        "Document the rate API\n\nSee: the guide\nhttps://docs.quillfeather.example/parcelkit\n",
        [("See", "the guide"), ("https", "//docs.quillfeather.example/parcelkit")],
    ),
    (
        "crlf",
        "Add rate cache\r\n\r\nBody.\r\n\r\nModel-Written: quill-assist/2.3\r\nAcked-by: Ola Fern\r\n",
        [("Model-Written", "quill-assist/2.3"), ("Acked-by", "Ola Fern")],
    ),
    # git keeps the \r before an unfolded line break (observed on git 2.39)
    ("crlf-continuation", "Add rate cache\r\n\r\nNote: a\r\n  b\r\n", [("Note", "a\r b")]),
    (
        "trailing-blank-lines",
        "Add rate cache\n\nModel-Written: quill-assist/2.3\n\n\n   \n\t\n",
        [("Model-Written", "quill-assist/2.3")],
    ),
    (
        "unicode-values",
        "Étiquettes: marges corrigées\n\nReviewed-by: Zoë Ångström <zoe@quillfeather.example>\n",
        [("Reviewed-by", "Zoë Ångström <zoe@quillfeather.example>")],
    ),
    ("unicode-key-is-text", "Fix labels\n\nPrüfer: Zoë\nModel-Written: quill-assist/2.3\n", []),
    (
        "empty-values",
        "Fix labels\n\nModel-Written:\nModel-Written-Scope:   \n",
        [("Model-Written", ""), ("Model-Written-Scope", "")],
    ),
    (
        "no-space-after-colon",
        "Fix labels\n\nModel-Written:quill-assist/2.3\nRefs:issue:42\n",
        [("Model-Written", "quill-assist/2.3"), ("Refs", "issue:42")],
    ),
    # git's isspace() leaves out \f and \v (observed on git 2.39)
    ("form-feed-is-not-space", "Fix labels\n\nNote: a\f\n", [("Note", "a\f")]),
    ("form-feed-line-is-not-continuation", "Fix labels\n\nNote: a\n\fb\n", []),
    ("carriage-return-starts-a-continuation", "Fix labels\n\nNote: a\n\rb\n", [("Note", "a b")]),
    ("underscore-key-is-text", "Fix labels\n\nModel_Written: quill-assist/2.3\n", []),
    ("two-word-key-is-text", "Fix labels\n\nModel Written: quill-assist/2.3\n", []),
    ("continuation-before-any-trailer", "Fix labels\n\n  indented\nModel-Written: quill-assist/2.3\n", []),
    (
        "old-conflicts-block-ignored",
        "Merge branch 'rates'\n\nModel-Written: quill-assist/2.3\n\nConflicts:\n\tsrc/parcelkit/rates.py\n",
        [("Model-Written", "quill-assist/2.3")],
    ),
    (
        "scissors-line",
        "Add rate cache\n\nModel-Written: quill-assist/2.3\n"
        "# ------------------------ >8 ------------------------\nNot-This: one\n",
        [("Model-Written", "quill-assist/2.3")],
    ),
    (
        "signed-off-by-without-space-is-ordinary",
        "Fix labels\n\nSigned-off-by:Mara\nplain prose\n",
        [],
    ),
]


def git_parse(message: str, cwd: Path) -> str:
    """What `git interpret-trailers --parse` prints for ``message`` (the source of truth)."""
    done = subprocess.run(
        ["git", "interpret-trailers", "--parse"],
        input=message.encode(),
        capture_output=True,
        env=GIT_ENV,
        cwd=cwd,
        check=True,
        timeout=60,
    )
    return done.stdout.decode()


def as_git_prints(pairs: list[tuple[str, str]]) -> str:
    return "".join(f"{key}: {value}\n" for key, value in pairs)


@pytest.mark.parametrize(("message", "expected"), [c[1:] for c in CASES], ids=[c[0] for c in CASES])
def test_parse_trailers_agrees_with_git(message: str, expected: list[tuple[str, str]], tmp_path: Path) -> None:
    # source: git interpret-trailers --parse, the same message on stdin
    assert git_parse(message, tmp_path) == as_git_prints(expected)
    assert parse_trailers(message) == expected


def test_enough_cases() -> None:
    assert len(CASES) >= 25
    assert len({case_id for case_id, _, _ in CASES}) == len(CASES)


def test_generated_messages_agree_with_git(tmp_path: Path) -> None:
    """Every last paragraph of three lines drawn from a few tricky kinds of line agrees with git."""
    kinds = ["Model-Written: quill-assist/2.3", "  continued", "# comment", "plain prose", SOB, "Refs:42"]
    messages = [f"Add rate cache\n\n{a}\n{b}\n{c}\n" for a in kinds for b in kinds for c in kinds]
    ours = [as_git_prints(parse_trailers(message)) for message in messages]
    # source: git interpret-trailers --parse, one run per message
    assert ours == [git_parse(message, tmp_path) for message in messages]
    assert any(ours) and not all(ours)


def test_nul_ends_the_message() -> None:
    # git reads the message as a C string (observed: text after a NUL is ignored)
    assert parse_trailers("Fix\n\nA: 1\n\0\nB: 2\n") == [("A", "1")]


# --- machine_mark -------------------------------------------------------------------------------------


def test_keys() -> None:
    assert (MACHINE_KEY, SCOPE_KEY) == ("Model-Written", "Model-Written-Scope")


def test_no_mark_without_the_trailer() -> None:
    assert machine_mark("Fix labels\n\nSigned-off-by: Mara\n") is None
    assert machine_mark("Fix labels\n\nModel-Written-Scope: src/\n") is None


def test_no_mark_when_the_key_is_not_in_the_trailer_block() -> None:
    assert machine_mark("Model-Written: quill-assist/2.3\n") is None
    assert machine_mark("Fix labels\n\nModel-Written: quill-assist/2.3\n\nThanks for the review.\n") is None
    assert machine_mark("Fix labels\n\nBody.\n---\nModel-Written: quill-assist/2.3\n") is None


def test_mark_whole_commit() -> None:
    message = f"Add rate cache\n\nBody.\n\nModel-Written: quill-assist/2.3\n{SOB}\n"
    assert machine_mark(message) == MachineMark(agent="quill-assist/2.3", scope=())


def test_mark_key_is_case_insensitive_and_last_agent_wins() -> None:
    message = "Add rate cache\n\nmodel-written: quill-assist/2.2\nMODEL-WRITTEN: quill-assist/2.3\n"
    assert machine_mark(message) == MachineMark(agent="quill-assist/2.3")


def test_mark_empty_agent_is_unknown() -> None:
    assert machine_mark("Add rate cache\n\nModel-Written:\n") == MachineMark(agent="unknown")


def test_mark_scope_from_several_trailers() -> None:
    message = (
        "Add rate cache\n\n"
        "Model-Written: quill-assist/2.3\n"
        "Model-Written-Scope: src/parcelkit/rates/ tests/test_rates.py\n"
        "model-written-scope: docs/**/*.md\n"
        "  src/parcelkit/zones.py src/parcelkit/rates/\n"
    )
    mark = machine_mark(message)
    assert mark == MachineMark(
        agent="quill-assist/2.3",
        scope=("src/parcelkit/rates/", "tests/test_rates.py", "docs/**/*.md", "src/parcelkit/zones.py"),
    )


def test_mark_empty_scope_trailer_means_whole_commit() -> None:
    mark = machine_mark("Add rate cache\n\nModel-Written: quill-assist/2.3\nModel-Written-Scope:\n")
    assert mark == MachineMark(agent="quill-assist/2.3", scope=())


# --- path_in_scope ------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("pattern", "path", "expected"),
    [
        ("src/parcelkit/", "src/parcelkit/rates.py", True),
        ("src/parcelkit/", "src/parcelkit/zones/table.py", True),
        ("src/parcelkit/", "src/parcelkitx/rates.py", False),
        ("src/parcelkit/", "src/parcelkit", False),
        ("src/parcelkit", "src/parcelkit/zones/table.py", True),
        ("src/*.py", "src/setup.py", True),
        ("src/*.py", "src/parcelkit/rates.py", False),
        ("src/**/*.py", "src/setup.py", True),
        ("src/**/*.py", "src/parcelkit/zones/table.py", True),
        ("**/test_*.py", "test_cli.py", True),
        ("**/test_*.py", "tests/unit/test_rates.py", True),
        ("**/test_*.py", "tests/unit/mytest_rates.py", False),
        ("tests/**", "tests/unit/test_rates.py", True),
        ("tests/**", "tests", False),
        ("src/p?rcelkit/rates.py", "src/parcelkit/rates.py", True),
        ("src/p?rcelkit/rates.py", "src/p/rcelkit/rates.py", False),
        ("src/*/", "src/parcelkit/rates.py", True),
        ("src/*/", "src/setup.py", False),
        ("docs/[a-m]*.md", "docs/labels.md", True),
        ("docs/[!a-m]*.md", "docs/labels.md", False),
        ("docs/[!a-m]*.md", "docs/zones.md", True),
        ("docs/[z-a]*.md", "docs/zones.md", False),  # a reversed range matches nothing
        ("src/parcelkit[!x]zones/table.py", "src/parcelkit/zones/table.py", False),
        ("/README.md", "README.md", True),
        ("./README.md", "README.md", True),
        ("README.md", "docs/README.md", False),
        ("src/a**b.py", "src/a/x/b.py", False),  # other runs of '*' act as one '*' (git's gitignore docs)
        (r"docs/\*.md", "docs/*.md", True),
        (r"docs/\*.md", "docs/a.md", False),
        ("**", "any/path/at/all.py", True),
    ],
)
def test_path_in_scope(pattern: str, path: str, expected: bool) -> None:
    assert path_in_scope(path, (pattern,)) is expected


def test_empty_scope_covers_everything() -> None:
    assert path_in_scope("src/parcelkit/rates.py", ())


def test_any_pattern_of_the_scope_may_match() -> None:
    scope = ("docs/", "src/parcelkit/zones.py")
    assert path_in_scope("src/parcelkit/zones.py", scope)
    assert path_in_scope("docs/guide/index.md", scope)
    assert not path_in_scope("src/parcelkit/rates.py", scope)


REPO_FILES = [
    "README.md",
    "setup.py",
    "src/parcelkit/__init__.py",
    "src/parcelkit/rates.py",
    "src/parcelkit/contest_rules.py",
    "src/parcelkit/zones/table.py",
    "src/parcelkit/zones/data/eu.csv",
    "src/parcelkitx/other.py",
    "tests/test_rates.py",
    "tests/unit/test_zones.py",
    "docs/labels.md",
    "docs/zones.md",
]
GLOB_PATTERNS = [
    "src",
    "src/",
    "src/parcelkit",
    "src/parcelkit/*",
    "src/parcelkit/*.py",
    "src/**",
    "src/**/*.py",
    "**/*.py",
    "**/test_*.py",
    "tests/**/test_*.py",
    "*.py",
    "?etup.py",
    "src/parcelkit/zones/**/*.csv",
    "docs/[a-m]*.md",
    "docs/[!a-m]*.md",
    "*/parcelkit/*.py",
    "**/zones/**",
    "doc*",
    "src/parcelkit[!x]zones/table.py",
]


def test_path_in_scope_agrees_with_git_glob_pathspec(tmp_path: Path) -> None:
    for name in REPO_FILES:
        (tmp_path / name).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / name).write_text("x\n")
    subprocess.run(["git", "init", "-q"], cwd=tmp_path, env=GIT_ENV, check=True)
    subprocess.run(["git", "add", "--", *REPO_FILES], cwd=tmp_path, env=GIT_ENV, check=True)
    for pattern in GLOB_PATTERNS:
        # source: git ls-files with the ':(glob)' pathspec magic, on a real index
        listed = subprocess.run(
            ["git", "ls-files", "-z", "--", f":(glob){pattern}"],
            cwd=tmp_path,
            env=GIT_ENV,
            capture_output=True,
            text=True,
            check=True,
        ).stdout.split("\0")[:-1]
        ours = [name for name in sorted(REPO_FILES) if path_in_scope(name, (pattern,))]
        assert ours == sorted(listed), pattern


def test_import_stays_light() -> None:
    code = (
        "import sys; before = set(sys.modules); import verifier.provenance.trailers; "
        "print(' '.join(sorted(set(sys.modules) - before)))"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=60)
    loaded = set(done.stdout.split())
    heavy = {"subprocess", "git", "yaml", "coverage", "pytest", "docker", "unidiff", "fnmatch"}
    assert "verifier.provenance.trailers" in loaded
    assert not loaded & heavy
