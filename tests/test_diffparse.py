"""Tests of verifier.change.diff on the output of real git, in repositories built in tmp_path.

Every case checks the parsed line counts per file against ``git diff --numstat`` (git's own count is the
reference; for a binary file git prints '-' for both) and the line numbers against the content the test
wrote. Each case also parses the patch twice, with and without the listing, and expects the same files.
"""

from __future__ import annotations

import os
import subprocess
from dataclasses import replace
from pathlib import Path

import pytest

from verifier.change.diff import DIFF_ARGS, RAW_ARGS, parse_diff
from verifier.errors import CannotVerify
from verifier.models import FileChange


class Repo:
    """A git repository in a temp folder, with no user or system config leaking in."""

    def __init__(self, root: Path) -> None:
        self.root = root
        self.env = {
            "PATH": os.environ["PATH"],
            "HOME": str(root.parent),
            "GIT_CONFIG_NOSYSTEM": "1",
            "GIT_CONFIG_GLOBAL": os.devnull,
            "GIT_AUTHOR_NAME": "Quillfeather Dev",
            "GIT_AUTHOR_EMAIL": "dev@quillfeather.example",
            "GIT_COMMITTER_NAME": "Quillfeather Dev",
            "GIT_COMMITTER_EMAIL": "dev@quillfeather.example",
        }
        root.mkdir()
        self.git("init", "-q", "-b", "main")

    def git(self, *args: str, cwd: Path | None = None) -> bytes:
        done = subprocess.run(["git", *args], cwd=cwd or self.root, env=self.env, capture_output=True, check=False)
        assert done.returncode == 0, done.stderr.decode(errors="replace")
        return done.stdout

    def write(self, path: str, content: bytes) -> None:
        target = self.root / path
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_bytes(content)

    def link(self, path: str, target: str) -> None:
        (self.root / path).symlink_to(target)

    def remove(self, path: str) -> None:
        (self.root / path).unlink()

    def commit(self, message: str = "parcelkit change") -> str:
        self.git("add", "-A")
        self.git("commit", "-q", "--allow-empty", "-m", message)
        return self.git("rev-parse", "HEAD").decode().strip()

    def numstat(self, *revisions: str, extra: tuple[str, ...] = ()) -> dict[str, tuple[int | None, int | None]]:
        """git's own per-file counts (the outside reference); None where git prints '-' (binary)."""
        out = self.git("diff", "--numstat", "-z", "-M", "--diff-algorithm=myers", *extra, *revisions)
        fields = out.split(b"\0")
        counts: dict[str, tuple[int | None, int | None]] = {}
        i = 0
        while i < len(fields) - 1:
            added, removed, path = fields[i].split(b"\t", 2)
            if path:
                i += 1
            else:  # a rename or copy: the two paths follow as their own fields
                path = fields[i + 2]
                i += 3
            counts[os.fsdecode(path)] = (_count(added), _count(removed))
        return counts

    def parse(self, *revisions: str, extra: tuple[str, ...] = (), cwd: Path | None = None) -> dict[str, FileChange]:
        """Run git as gitio will, parse, and check the result against git's numstat."""
        patch = self.git(*DIFF_ARGS, *extra, *revisions, cwd=cwd)
        listing = self.git(*RAW_ARGS, *extra, *revisions, cwd=cwd)
        with_listing = parse_diff(patch, listing)
        alone = parse_diff(patch)
        assert [without_modes(c) for c in alone] == [without_modes(c) for c in with_listing]
        changes = {c.path: c for c in with_listing}
        assert len(changes) == len(with_listing), "one entry per head path"
        # git counts a submodule's "Subproject commit <id>" line; the gate holds no lines for one
        reference = {path: numbers for path, numbers in self.numstat(*revisions, extra=extra).items()}
        for path, change in changes.items():
            if "160000" in (change.old_mode, change.new_mode):
                assert (change.added_lines, change.removed_lines) == ((), ())
                reference[path] = (0, 0)
        assert counts(changes) == reference
        return changes


def _count(field: bytes) -> int | None:
    return None if field == b"-" else int(field)


def without_modes(change: FileChange) -> FileChange:
    return replace(change, old_mode=None, new_mode=None)


def counts(changes: dict[str, FileChange]) -> dict[str, tuple[int | None, int | None]]:
    return {
        path: (None, None) if c.binary else (len(c.added_lines), len(c.removed_lines)) for path, c in changes.items()
    }


def numbered(*lines: str) -> bytes:
    return "".join(line + "\n" for line in lines).encode()


@pytest.fixture
def repo(tmp_path: Path) -> Repo:
    return Repo(tmp_path / "parcelkit")


def test_modified_file_line_numbers(repo: Repo) -> None:
    repo.write("parcelkit/route.py", numbered(*(f"line {n}" for n in range(1, 11))))
    base = repo.commit()
    # base 1..10; head: 3 replaced, 6 and 7 deleted, two lines inserted after 9
    repo.write(
        "parcelkit/route.py",
        numbered("line 1", "line 2", "LINE 3", "line 4", "line 5", "line 8", "line 9", "new a", "new b", "line 10"),
    )
    head = repo.commit()
    change = repo.parse(base, head)["parcelkit/route.py"]
    assert change.status == "modified"
    assert change.old_path == "parcelkit/route.py"
    assert (change.old_mode, change.new_mode) == ("100644", "100644")
    assert change.added_lines == (3, 8, 9)
    assert change.removed_lines == (3, 6, 7)


def test_added_and_deleted_files(repo: Repo) -> None:
    repo.write("old.py", numbered("a", "b", "c"))
    base = repo.commit()
    repo.remove("old.py")
    repo.write("depot/new.py", numbered("x", "y"))
    changes = repo.parse(base, repo.commit())
    added, deleted = changes["depot/new.py"], changes["old.py"]
    assert (added.status, added.old_path, added.old_mode, added.new_mode) == ("added", None, None, "100644")
    assert (added.added_lines, added.removed_lines) == ((1, 2), ())
    assert (deleted.status, deleted.old_path, deleted.old_mode, deleted.new_mode) == (
        "deleted",
        "old.py",
        "100644",
        None,
    )
    assert (deleted.added_lines, deleted.removed_lines) == ((), (1, 2, 3))


def test_pure_rename_has_no_lines(repo: Repo) -> None:
    body = numbered(*(f"def step_{n}(): return {n}" for n in range(20)))
    repo.write("parcelkit/old_name.py", body)
    base = repo.commit()
    repo.remove("parcelkit/old_name.py")
    repo.write("parcelkit/new name.py", body)
    change = repo.parse(base, repo.commit())["parcelkit/new name.py"]
    assert (change.status, change.old_path) == ("renamed", "parcelkit/old_name.py")
    assert (change.added_lines, change.removed_lines) == ((), ())
    # a 100% rename has no index line: the modes come from the listing alone
    assert (change.old_mode, change.new_mode) == ("100644", "100644")


def test_rename_with_edits_numbers_each_side(repo: Repo) -> None:
    repo.write("a.py", numbered(*(f"keep {n}" for n in range(1, 21))))
    base = repo.commit()
    repo.remove("a.py")
    lines = [f"keep {n}" for n in range(1, 21)]
    lines[4] = "edited 5"
    lines.insert(10, "inserted")
    repo.write("pkg/b.py", numbered(*lines))
    change = repo.parse(base, repo.commit())["pkg/b.py"]
    assert (change.status, change.old_path) == ("renamed", "a.py")
    assert change.added_lines == (5, 11)
    assert change.removed_lines == (5,)


def test_copy_when_copy_detection_is_asked_for(repo: Repo) -> None:
    # DIFF_ARGS detects renames only; a caller that adds copy detection still gets copies parsed
    repo.write("template.py", numbered(*(f"row {n}" for n in range(30))))
    base = repo.commit()
    repo.write("template.py", numbered(*(f"row {n}" for n in range(30)), "tail"))
    repo.write("copy.py", numbered(*(f"row {n}" for n in range(30)), "copied tail"))
    changes = repo.parse(base, repo.commit(), extra=("-C", "--find-copies-harder"))
    assert (changes["copy.py"].status, changes["copy.py"].old_path) == ("copied", "template.py")
    assert changes["copy.py"].added_lines == (31,)
    assert changes["template.py"].status == "modified"
    without_copies = repo.parse(base, "HEAD")
    assert without_copies["copy.py"].status == "added"
    assert without_copies["copy.py"].added_lines == tuple(range(1, 32))


def test_mode_change_only(repo: Repo) -> None:
    repo.write("run me.sh", numbered("#!/bin/sh", "echo parcel"))
    base = repo.commit()
    (repo.root / "run me.sh").chmod(0o755)
    change = repo.parse(base, repo.commit())["run me.sh"]
    assert (change.status, change.old_mode, change.new_mode) == ("modified", "100644", "100755")
    assert (change.added_lines, change.removed_lines, change.binary) == ((), (), False)


def test_binary_files(repo: Repo) -> None:
    repo.write("logo b/x.png", b"\x89PNG\0\0\x01")
    repo.write("gone.bin", b"\0\1\2")
    base = repo.commit()
    repo.write("logo b/x.png", b"\x89PNG\0\0\x02")
    repo.remove("gone.bin")
    repo.write("fresh.bin", b"\0fresh")
    changes = repo.parse(base, repo.commit())
    assert {path: (c.status, c.binary) for path, c in changes.items()} == {
        "logo b/x.png": ("modified", True),
        "gone.bin": ("deleted", True),
        "fresh.bin": ("added", True),
    }
    assert all(c.added_lines == c.removed_lines == () for c in changes.values())


def test_missing_final_newline(repo: Repo) -> None:
    repo.write("a.txt", b"one\ntwo")
    repo.write("b.txt", b"one\ntwo\n")
    repo.write("c.txt", b"one\ntwo")
    base = repo.commit()
    repo.write("a.txt", b"one\nthree")  # last line changed, still without newline
    repo.write("b.txt", b"one\ntwo")  # newline dropped
    repo.write("c.txt", b"one\ntwo\nthree\n")  # newline added, a line appended
    changes = repo.parse(base, repo.commit())
    assert (changes["a.txt"].added_lines, changes["a.txt"].removed_lines) == ((2,), (2,))
    assert (changes["b.txt"].added_lines, changes["b.txt"].removed_lines) == ((2,), (2,))
    assert (changes["c.txt"].added_lines, changes["c.txt"].removed_lines) == ((2, 3), (2,))


def test_crlf_and_other_line_separators_stay_inside_lines(repo: Repo) -> None:
    # git splits lines on LF only; CR, form feed and U+2028 are content (str.splitlines would split on them)
    repo.write("dos.txt", b"a\r\nb\r\nc\r\n")
    base = repo.commit()
    repo.write("dos.txt", b"a\r\nB\rstill B\x0c\xe2\x80\xa8\r\nc\r\nd\r\n")
    change = repo.parse(base, repo.commit())["dos.txt"]
    assert (change.added_lines, change.removed_lines) == ((2, 4), (2,))


def test_non_utf8_contents(repo: Repo) -> None:
    repo.write("latin1.py", b"# caf\xe9\nx = 1\n")
    base = repo.commit()
    repo.write("latin1.py", b"# caf\xe9 cr\xe8me\nx = 1\ny = '\xff\xfe'\n")
    change = repo.parse(base, repo.commit())["latin1.py"]
    assert (change.binary, change.added_lines, change.removed_lines) == (False, (1, 3), (1,))


def test_paths_with_spaces_and_b_slash_inside(repo: Repo) -> None:
    names = ["dir a/b c.txt", "x b/y b/z.py", "trailing space ", " leading"]
    for name in names:
        repo.write(name, numbered("1", "2"))
    repo.write("empty b/e", b"")
    base = repo.commit()
    for name in names:
        repo.write(name, numbered("1", "2", "3"))
    repo.remove("empty b/e")
    changes = repo.parse(base, repo.commit())
    assert sorted(changes) == sorted([*names, "empty b/e"])
    assert all(changes[name].added_lines == (3,) for name in names)
    assert changes["empty b/e"].status == "deleted"


def test_unicode_paths(repo: Repo) -> None:
    repo.write("données/naïve.py", numbered("a"))
    base = repo.commit()
    repo.write("données/naïve.py", numbered("a", "b"))
    repo.write("配送/日本.txt", numbered("x"))
    changes = repo.parse(base, repo.commit())
    assert changes["données/naïve.py"].added_lines == (2,)
    assert changes["配送/日本.txt"].status == "added"


QUOTED_NAMES = ["tab\there", 'quote"d', "back\\slash", "new\nline", "bell\x07", "ünï\tcode"]


def test_paths_git_quotes(repo: Repo) -> None:
    for name in QUOTED_NAMES:
        repo.write(name, numbered("1"))
    base = repo.commit()
    for name in QUOTED_NAMES:
        repo.write(name, numbered("1", "2"))
    repo.write("tab\there", numbered("1", "2"))
    (repo.root / "back\\slash").chmod(0o755)  # a hunk and a mode change
    (repo.root / 'quote"d').rename(repo.root / 'renamed "quote"')
    repo.commit()
    assert b'"a/tab\\there"' in repo.git(*DIFF_ARGS, base, "HEAD")  # git quotes these even so
    changes = repo.parse(base, "HEAD")
    assert sorted(changes) == sorted([*(n for n in QUOTED_NAMES if n != 'quote"d'), 'renamed "quote"'])
    assert changes['renamed "quote"'].old_path == 'quote"d'
    assert changes["back\\slash"].new_mode == "100755"
    assert all(c.added_lines == (2,) for c in changes.values())


def test_octal_quoting_of_non_ascii_paths(repo: Repo) -> None:
    # with core.quotePath=true git writes non-ASCII bytes as octal escapes; undoing them gives the same paths
    repo.write("ünï code.txt", numbered("a"))
    base = repo.commit()
    repo.write("ünï code.txt", numbered("a", "b"))
    head = repo.commit()
    quoting = tuple("core.quotePath=true" if arg == "core.quotePath=false" else arg for arg in DIFF_ARGS)
    patch = repo.git(*quoting, base, head)
    assert b'"a/\\303\\274n\\303\\257 code.txt"' in patch  # git's own octal quoting, as printed
    assert parse_diff(patch) == parse_diff(repo.git(*DIFF_ARGS, base, head))
    assert parse_diff(patch)[0].path == "ünï code.txt"


def test_non_utf8_path_bytes(repo: Repo) -> None:
    name = os.fsdecode(b"caf\xe9.txt")
    repo.write(name, numbered("a"))
    base = repo.commit()
    repo.write(name, numbered("a", "b"))
    changes = repo.parse(base, repo.commit())
    assert os.fsencode(next(iter(changes))) == b"caf\xe9.txt"


def test_empty_files_added(repo: Repo) -> None:
    base = repo.commit("empty start")
    repo.write("empty.txt", b"")
    repo.write("also empty b/x", b"")
    changes = repo.parse(base, repo.commit())
    assert {p: (c.status, c.added_lines, c.new_mode) for p, c in changes.items()} == {
        "empty.txt": ("added", (), "100644"),
        "also empty b/x": ("added", (), "100644"),
    }


def test_symlinks(repo: Repo) -> None:
    repo.link("current", "v1/parcel.py")
    base = repo.commit()
    repo.remove("current")
    repo.link("current", "v2/parcel.py")
    repo.link("fresh link", "somewhere else")
    changes = repo.parse(base, repo.commit())
    current, fresh = changes["current"], changes["fresh link"]
    assert (current.status, current.old_mode, current.new_mode) == ("modified", "120000", "120000")
    assert (current.added_lines, current.removed_lines) == ((1,), (1,))
    assert (fresh.status, fresh.new_mode, fresh.added_lines) == ("added", "120000", (1,))


def test_type_changes(repo: Repo) -> None:
    repo.write("was file", numbered("one", "two"))
    repo.link("was link", "target")
    base = repo.commit()
    repo.remove("was file")
    repo.link("was file", "elsewhere")
    repo.remove("was link")
    repo.write("was link", numbered("now", "a", "file"))
    changes = repo.parse(base, repo.commit())
    to_link, to_file = changes["was file"], changes["was link"]
    assert (to_link.status, to_link.old_path, to_link.old_mode, to_link.new_mode) == (
        "type-changed",
        "was file",
        "100644",
        "120000",
    )
    assert (to_link.added_lines, to_link.removed_lines) == ((1,), (1, 2))
    assert (to_file.status, to_file.old_mode, to_file.new_mode) == ("type-changed", "120000", "100644")
    assert (to_file.added_lines, to_file.removed_lines) == ((1, 2, 3), (1,))


def test_submodule_pointer(repo: Repo) -> None:
    pointer = repo.commit("anything to point at")
    repo.git("update-index", "--add", "--cacheinfo", f"160000,{pointer},vendor/routes")
    repo.git("commit", "-q", "-m", "add a gitlink")
    change = repo.parse(pointer, "HEAD")["vendor/routes"]
    # git's numstat counts the "Subproject commit" line as added; it is no line of this repository
    assert repo.numstat(pointer, "HEAD")["vendor/routes"] == (1, 0)
    assert (change.status, change.new_mode, change.added_lines) == ("added", "160000", ())


def test_root_commit_against_the_empty_tree(repo: Repo) -> None:
    empty_tree = repo.git("hash-object", "-t", "tree", os.devnull).decode().strip()
    repo.write("parcelkit/__init__.py", numbered("VERSION = 1", "NAME = 'parcelkit'"))
    repo.write("README", b"Quillfeather Logistics")
    repo.link("docs", "README")
    root = repo.commit("root")
    changes = repo.parse(empty_tree, root)
    assert {p: (c.status, c.added_lines) for p, c in changes.items()} == {
        "parcelkit/__init__.py": ("added", (1, 2)),
        "README": ("added", (1,)),
        "docs": ("added", (1,)),
    }


def test_large_file_with_many_hunks(repo: Repo) -> None:
    lines = [f"parcel {n} weighs {n * 3} g" for n in range(1, 3001)]
    repo.write("manifest.txt", numbered(*lines))
    base = repo.commit()
    changed = [f"PARCEL {n} rerouted" if n % 7 == 0 else line for n, line in enumerate(lines, 1)]
    repo.write("manifest.txt", numbered(*changed))
    patch = repo.git(*DIFF_ARGS, base, repo.commit())
    assert patch.count(b"\n@@ ") == 3000 // 7
    change = repo.parse(base, "HEAD")["manifest.txt"]
    assert change.added_lines == change.removed_lines == tuple(range(7, 3001, 7))


def test_staged_changes_against_head(repo: Repo) -> None:
    repo.write("a.py", numbered("a"))
    repo.commit()
    repo.write("a.py", numbered("a", "staged"))
    repo.git("add", "a.py")
    repo.write("a.py", numbered("a", "staged", "not staged"))
    change = repo.parse("HEAD", extra=("--cached",))["a.py"]
    assert change.added_lines == (2,)


def test_unmerged_index_is_refused(repo: Repo) -> None:
    repo.write("a.py", numbered("base"))
    repo.commit()
    repo.git("checkout", "-q", "-b", "side")
    repo.write("a.py", numbered("side"))
    repo.commit()
    repo.git("checkout", "-q", "main")
    repo.write("a.py", numbered("main"))
    repo.commit()
    subprocess.run(["git", "merge", "-q", "side"], cwd=repo.root, env=repo.env, capture_output=True)
    patch = repo.git(*DIFF_ARGS, "HEAD", "--cached")
    listing = repo.git(*RAW_ARGS, "HEAD", "--cached")
    with pytest.raises(CannotVerify, match=r"unresolved merge conflict: a\.py"):
        parse_diff(patch)
    with pytest.raises(CannotVerify, match=r"unresolved merge conflict: a\.py"):
        parse_diff(patch, listing)


HOSTILE_CONFIG = {
    "diff.noprefix": "true",
    "diff.mnemonicPrefix": "true",
    "color.ui": "always",
    "color.diff": "always",
    "core.quotePath": "true",
    "diff.external": "false",
    "diff.relative": "true",
    "diff.orderFile": "order.txt",
    "diff.interHunkContext": "10",
    "diff.context": "5",
    "diff.submodule": "log",
    "diff.algorithm": "patience",
    "diff.suppressBlankEmpty": "true",
    "diff.ignoreSubmodules": "all",
    "diff.upper.textconv": "tr a-z A-Z",
}


@pytest.mark.parametrize("renames", ["false", "copies"])
def test_hostile_user_config_changes_nothing(repo: Repo, renames: str) -> None:
    repo.write("sub/moved.py", numbered(*(f"stop {n}" for n in range(40))))
    repo.write("sub/edit.txt", numbered(*(f"crate {n}" for n in range(40))))
    repo.write("top é.py", numbered("x", "", "y"))
    repo.write(".gitattributes", b"*.txt diff=upper\n")
    repo.write("order.txt", b"top*\nsub/*\n")
    base = repo.commit()
    repo.remove("sub/moved.py")
    repo.write("sub/renamed.py", numbered(*(f"stop {n}" for n in range(40)), "added stop"))
    repo.write("sub/edit.txt", numbered(*(f"crate {n}" if n % 3 else "CHANGED" for n in range(40))))
    repo.write("top é.py", numbered("x", "", "y", "", "z"))
    repo.git("add", "-A")
    repo.git("update-index", "--add", "--cacheinfo", f"160000,{base},sub/vendor")
    repo.git("commit", "-q", "-m", "hostile")
    head = repo.git("rev-parse", "HEAD").decode().strip()
    clean = repo.parse(base, head)
    assert clean["sub/renamed.py"].status == "renamed"
    assert (clean["sub/vendor"].new_mode, clean["sub/vendor"].added_lines) == ("160000", ())

    for key, value in {**HOSTILE_CONFIG, "diff.renames": renames}.items():
        repo.git("config", key, value)
    repo.env["GIT_EXTERNAL_DIFF"] = "false"
    patch = repo.git(*DIFF_ARGS, base, head, cwd=repo.root / "sub")
    listing = repo.git(*RAW_ARGS, base, head, cwd=repo.root / "sub")
    assert b"\x1b[" not in patch
    assert parse_diff(patch, listing) == tuple(clean.values())


def test_listing_that_disagrees_is_refused(repo: Repo) -> None:
    repo.write("a.py", numbered("a"))
    repo.write("b.py", numbered("b"))
    base = repo.commit()
    repo.write("a.py", numbered("a", "a"))
    repo.write("b.py", numbered("b", "b"))
    head = repo.commit()
    patch = repo.git(*DIFF_ARGS, base, head)
    only_a = repo.git(*RAW_ARGS, base, head, "--", "a.py")
    with pytest.raises(CannotVerify, match="2 files but the listing has 1"):
        parse_diff(patch, only_a)
    deleting = repo.git(*RAW_ARGS, base, repo.git("hash-object", "-t", "tree", os.devnull).decode().strip())
    with pytest.raises(CannotVerify, match="where the listing shows"):
        parse_diff(patch, deleting)


@pytest.mark.parametrize(
    "patch",
    [
        b"warning: something odd\n",
        b"diff --git a/x b/x\nindex 1..2 100644\n--- a/x\n+++ b/x\n@@ -1 +1 @@\n-a\n",
        b"diff --git a/x b/x\nsurprise header line\n",
        b"diff --git a/x y b/z\nold mode 100644\nnew mode 100755\n",
        b'diff --git "a/x\\q" "b/x\\q"\nold mode 100644\nnew mode 100755\n',
    ],
    ids=["stray text", "short hunk", "unknown header", "ambiguous names", "bad escape"],
)
def test_malformed_patches_are_refused_with_a_message(patch: bytes) -> None:
    with pytest.raises(CannotVerify, match="cannot read git's diff output"):
        parse_diff(patch)


def test_empty_diff() -> None:
    assert parse_diff(b"", b"") == ()
