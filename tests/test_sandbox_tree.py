"""The tree tested is the tree committed, and names are data.

The sandbox's tree is written by :mod:`verifier.gitio` from object ids and blobs: no git attribute
(``export-ignore``, ``export-subst``, end-of-line conversion) may change it. Every check compares the
written tree with what git itself lists (``git ls-tree -r -z``) and holds (``git cat-file blob``); a
diff must show added lines whatever ``-diff`` / ``binary`` attributes say, checked against
``git diff --numstat --text``. Paths with a newline, non-UTF-8 bytes, a comma or a glob bracket go
through every git read unchanged. The end-to-end cases are the attacks (exit 1 or 3) beside their
honest versions (exit 0).
"""

from __future__ import annotations

import io
import json
import os
import subprocess
import sys
import tarfile
from pathlib import Path

import pytest
from conftest import ROOT, machine, test_sandbox

from verifier.change.stage import RevisionSpec, read_change
from verifier.demo import scenario as demo
from verifier.demo.scratch import ScratchRepo
from verifier.errors import CannotVerify
from verifier.gitio import Git, path_bytes, path_text

ATTRIBUTES = b"tests/test_human.py export-ignore\nparcelkit/version.py export-subst\n*.py -diff\n*.dat binary\n"
VERSION = b'COMMIT = "$Format:%H$"\n'
ODD_NAMES = [b"parcelkit/new\nline.py", b"parcelkit/caf\xe9.py", b"parcelkit/a,b.py", b"parcelkit/[ab].py"]


def git_bytes(repo: ScratchRepo, *args: str, input: bytes | None = None) -> bytes:
    done = subprocess.run(["git", *args], cwd=repo.path, input=input, capture_output=True, check=True)
    return done.stdout


def git_listing(repo: ScratchRepo, revision: str) -> dict[bytes, tuple[str, str]]:
    """path -> (mode, object id), as ``git ls-tree -r -z`` lists the commit (the outside reference)."""
    listing = {}
    for record in git_bytes(repo, "ls-tree", "-r", "-z", revision).split(b"\0"):
        if record:
            meta, path = record.split(b"\t", 1)
            mode, _kind, oid = meta.decode().split()
            listing[path] = (mode, oid)
    return listing


def written(tree: Path) -> dict[bytes, tuple[str, bytes]]:
    """path -> (mode as git writes it, content or link target) of everything below ``tree``."""
    found = {}
    root = os.fsencode(tree)
    for folder, folders, files in os.walk(root):
        for name in files + [f for f in folders if os.path.islink(os.path.join(folder, f))]:
            full = os.path.join(folder, name)
            relative = os.path.relpath(full, root)
            if os.path.islink(full):
                found[relative] = ("120000", os.readlink(full))
            else:
                mode = "100755" if os.stat(full).st_mode & 0o100 else "100644"
                found[relative] = (mode, Path(os.fsdecode(full)).read_bytes())
    return found


def attributed_repo(repo: ScratchRepo) -> str:
    """A commit whose .gitattributes would change an archive of it, with an executable and two links."""
    repo.write({".gitattributes": ATTRIBUTES, "parcelkit/version.py": VERSION})
    repo.write({"tests/test_human.py": "def test_kept():\n    assert True\n", "data/table.dat": b"rate 1\n"})
    repo.write({"run.sh": "#!/bin/sh\necho run\n", "parcelkit/__init__.py": ""})
    (repo.path / "run.sh").chmod(0o755)
    (repo.path / "docs").mkdir()
    (repo.path / "docs" / "current").symlink_to("../parcelkit/version.py")
    return repo.commit("Start")


def test_the_tree_is_the_commit_whatever_the_attributes_say(repo: ScratchRepo, tmp_path: Path) -> None:
    head = attributed_repo(repo)
    tree = tmp_path / "tree"
    Git(repo.path).export_commit(head, tree)
    expected = {}
    for path, (mode, oid) in git_listing(repo, head).items():
        expected[path] = (mode, git_bytes(repo, "cat-file", "blob", oid))
    assert written(tree) == expected
    assert (tree / "tests" / "test_human.py").is_file()  # export-ignore did not apply
    assert (tree / "parcelkit" / "version.py").read_bytes() == VERSION  # nor did export-subst
    # the reference itself: git archive does drop and rewrite them, so the comparison above can fail
    with tarfile.open(fileobj=io.BytesIO(git_bytes(repo, "archive", "--format=tar", head))) as archive:
        assert "tests/test_human.py" not in archive.getnames()
        version = archive.extractfile("parcelkit/version.py")
        assert version is not None and version.read() != VERSION


def test_the_index_is_written_as_staged_without_conversion(repo: ScratchRepo, tmp_path: Path) -> None:
    repo.commit("Start", {".gitattributes": "*.txt text eol=crlf\n", "a.txt": "one\n"})
    repo.write({"a.txt": "one\ntwo\n", "b.txt": "staged\n"})
    repo.git("add", "a.txt", "b.txt")
    tree = tmp_path / "tree"
    Git(repo.path).export_index(tree)
    staged = git_bytes(repo, "ls-files", "-s", "-z").split(b"\0")
    for record in filter(None, staged):
        meta, path = record.split(b"\t", 1)
        oid = meta.split()[1].decode()
        assert (tree / os.fsdecode(path)).read_bytes() == git_bytes(repo, "cat-file", "blob", oid)
    assert (tree / "a.txt").read_bytes() == b"one\ntwo\n"  # git checkout-index would write CRLF here


@pytest.mark.parametrize(
    "target", ["/etc/hostname", "../../outside", "../" * 40 + "etc/passwd", "loop/../../.."], ids=str
)
def test_a_link_out_of_the_tree_is_refused_with_what_it_is(repo: ScratchRepo, tmp_path: Path, target: str) -> None:
    repo.write({"parcelkit/__init__.py": ""})
    (repo.path / "parcelkit" / "loop").symlink_to(".")
    (repo.path / "parcelkit" / "link").symlink_to(target)
    head = repo.commit("Start")
    with pytest.raises(CannotVerify, match="symbolic link that points outside the repository") as raised:
        Git(repo.path).export_commit(head, tmp_path / "tree")
    assert "parcelkit/link" in str(raised.value)
    assert "workspace" not in str(raised.value)


def test_a_chain_of_links_that_leaves_the_tree_is_refused(repo: ScratchRepo, tmp_path: Path) -> None:
    repo.write({"parcelkit/__init__.py": ""})
    (repo.path / "up").symlink_to("..")  # from the root, ".." leaves the tree
    head = repo.commit("Start")
    with pytest.raises(CannotVerify, match="outside the repository"):
        Git(repo.path).export_commit(head, tmp_path / "tree")
    repo.git("rm", "-q", "up")
    (repo.path / "parcelkit" / "up").symlink_to("..")  # inside: the root
    (repo.path / "parcelkit" / "far").symlink_to("up/..")  # each link stays inside on its own; the chain does not
    head = repo.commit("Chain")
    with pytest.raises(CannotVerify, match="'parcelkit/far'"):
        Git(repo.path).export_commit(head, tmp_path / "tree2")


def test_links_inside_the_tree_are_kept(repo: ScratchRepo, tmp_path: Path) -> None:
    repo.write({"parcelkit/__init__.py": "", "parcelkit/rates.py": demo.RATES})
    (repo.path / "parcelkit" / "up").symlink_to("..")
    (repo.path / "current.py").symlink_to("parcelkit/up/parcelkit/rates.py")
    head = repo.commit("Start")
    tree = tmp_path / "tree"
    Git(repo.path).export_commit(head, tree)
    assert (tree / "current.py").read_text() == demo.RATES


def test_added_lines_show_whatever_the_attributes_say(repo: ScratchRepo) -> None:
    base = attributed_repo(repo)
    repo.write({"parcelkit/rates.py": "def price(w):\n    return w\n", "data/table.dat": b"rate 1\nrate 2\n"})
    head = repo.commit(machine("Rates"))
    change = read_change(Git(repo.path), RevisionSpec(f"{base}..{head}"))
    found = {f.path: (len(f.added_lines), len(f.removed_lines)) for f in change.files}
    # git's own count with the attributes overridden: $GIT_DIR/info/attributes wins over the tree's
    # .gitattributes (gitattributes(5)), and "* diff" undoes -diff and binary. (git 2.39's --numstat
    # prints '-' for such files even with --text, so --text alone is no reference there.)
    plain = git_bytes(repo, "diff", "--numstat", "--text", base, head).decode()
    assert "-\t-\tparcelkit/rates.py" in plain  # the attribute does hide the lines from git's count
    (repo.path / ".git" / "info").mkdir(exist_ok=True)
    (repo.path / ".git" / "info" / "attributes").write_text("* diff\n")
    reference = {}
    for line in git_bytes(repo, "diff", "--numstat", base, head).decode().splitlines():
        added, removed, path = line.split("\t")
        reference[path] = (int(added), int(removed))
    assert found == reference == {"parcelkit/rates.py": (2, 0), "data/table.dat": (1, 0)}


@pytest.mark.parametrize("name", ODD_NAMES, ids=lambda name: repr(name))
def test_odd_names_survive_every_git_read(repo: ScratchRepo, tmp_path: Path, name: bytes) -> None:
    repo.commit("Start", {"parcelkit/__init__.py": ""})
    os.makedirs(repo.path / "parcelkit", exist_ok=True)
    with open(os.path.join(os.fsencode(repo.path), name), "wb") as handle:
        handle.write(b"VALUE = 1\n")
    head = repo.commit(machine("Odd"))
    git = Git(repo.path)
    path = path_text(name)
    assert path_bytes(path) == name
    change = read_change(git, RevisionSpec("HEAD"))
    assert [(f.path, f.added_lines) for f in change.files] == [(path, (1,))]
    assert git.read_blobs([f"{head}:{path}", f"{head}:parcelkit/__init__.py", f"{head}:{path}x"]) == {
        f"{head}:{path}": b"VALUE = 1\n",
        f"{head}:parcelkit/__init__.py": b"",
    }
    assert git.touched_paths([head]) == {head: [path]}
    tree = tmp_path / "tree"
    git.export_commit(head, tree)
    assert sorted(os.listdir(os.fsencode(tree / "parcelkit"))) == sorted([b"__init__.py", name.split(b"/")[1]])


def check(repo: ScratchRepo, *args: str) -> tuple[int, dict | None, str]:
    """``verifier check`` as a real process; output kept as bytes (a path may not be UTF-8)."""
    report_file = repo.path.parent / "report.json"
    report_file.unlink(missing_ok=True)
    command = [sys.executable, "-m", "verifier", "-C", str(repo.path), "check", *args]
    command += ["--sandbox", test_sandbox(), "--format", "json", "--output", str(report_file)]
    done = subprocess.run(command, capture_output=True, env={**os.environ, "PYTHONPATH": str(ROOT)}, timeout=300)
    # tolerant reading: a non-UTF-8 path must not hide the exit code this test checks
    report = json.loads(report_file.read_bytes().decode("utf-8", "replace")) if report_file.exists() else None
    return done.returncode, report, (done.stdout + done.stderr).decode("utf-8", "replace")


def start(repo: ScratchRepo, extra: dict[str, str | bytes] | None = None) -> str:
    return repo.commit(
        "Start",
        {
            "parcelkit/__init__.py": "",
            "parcelkit/rates.py": demo.RATES,
            "tests/test_rates.py": demo.TEST_RATES,
            **(extra or {}),
        },
    )


WRONG_RATES = demo.RATES.replace("BASE_RATE = 4.50", "BASE_RATE = 0.50")
UNTESTED = "def rebate(order):\n    if order.vip:\n        return 5\n    return 0\n"


@pytest.mark.slow
def test_an_export_ignored_human_test_still_runs(repo: ScratchRepo) -> None:
    start(repo, {".gitattributes": "tests/test_rates.py export-ignore\n"})
    repo.commit(machine("Cheaper"), {"parcelkit/rates.py": WRONG_RATES})
    code, report, output = check(repo, "HEAD")
    assert code == 1, output  # the human test ran and failed
    assert report and report["verdict"] == "block"


# the honest changes add a constant and the test that checks it (so its mutants are killed)
NOTE_TEST = "from parcelkit.rates import NOTE\n\n\ndef test_note():\n    assert NOTE == 'rates in euros'\n"


@pytest.mark.slow
def test_an_export_ignored_human_test_passes_an_honest_change(repo: ScratchRepo) -> None:
    start(repo, {".gitattributes": "tests/test_rates.py export-ignore\n"})
    honest = demo.RATES + "\n\nNOTE = 'rates in euros'\n"
    repo.commit(machine("Note"), {"parcelkit/rates.py": honest, "tests/test_note.py": NOTE_TEST})
    code, report, output = check(repo, "HEAD")
    assert code == 0, output
    assert report and report["tests"]["run"] >= 2, "the human test ran"


@pytest.mark.slow
def test_a_no_diff_attribute_does_not_hide_untested_lines(repo: ScratchRepo) -> None:
    start(repo)
    repo.commit(machine("Rebate"), {".gitattributes": "*.py -diff binary\n", "parcelkit/rebate.py": UNTESTED})
    code, report, output = check(repo, "HEAD")
    assert code in (1, 3), output
    assert report and "parcelkit/rebate.py" in report["machine_lines"]


@pytest.mark.slow
def test_an_export_subst_source_is_tested_as_committed(repo: ScratchRepo) -> None:
    # archived, '$Format:%H$' would become the commit id and the test below would fail
    test = 'from parcelkit.version import COMMIT\n\n\ndef test_commit():\n    assert COMMIT == "$" + "Format:%H$"\n'
    start(repo, {".gitattributes": "parcelkit/version.py export-subst\n"})
    repo.commit(machine("Version"), {"parcelkit/version.py": VERSION.decode(), "tests/test_version.py": test})
    code, _report, output = check(repo, "HEAD")
    assert code == 0, output


NAMED_CASES = [
    ODD_NAMES[0],
    ODD_NAMES[1],  # not UTF-8: every report format writes the byte as \xe9 (verifier.report.bounds.valid_text)
    ODD_NAMES[2],
    ODD_NAMES[3],  # the harness passes judged files to coverage by name, not as --include globs
]


@pytest.mark.slow
@pytest.mark.parametrize("name", NAMED_CASES, ids=repr)
def test_untested_code_under_an_odd_name_is_blocked(repo: ScratchRepo, name: bytes) -> None:
    start(repo)
    with open(os.path.join(os.fsencode(repo.path), name), "wb") as handle:
        handle.write(UNTESTED.encode())
    repo.commit(machine("Rebate"))
    code, report, output = check(repo, "HEAD")
    assert code in (1, 3), output
    assert "internal error" not in output
    assert report is not None and report["verdict"] in ("block", "error")


@pytest.mark.slow
def test_a_machine_written_submodule_is_named_and_not_verified(repo: ScratchRepo, tmp_path: Path) -> None:
    start(repo)
    pointer = repo.head()
    repo.write({"parcelkit/extra.py": "X = 1\n"})
    repo.git("add", "parcelkit/extra.py")
    repo.git("update-index", "--add", "--cacheinfo", f"160000,{pointer},vendor/routes")
    repo.git("commit", "-q", "-m", machine("Vendor"))
    code, _report, output = check(repo, "HEAD")
    assert code == 3, output
    assert "submodule 'vendor/routes'" in output
    assert "Traceback" not in output


@pytest.mark.slow
def test_a_human_submodule_beside_a_machine_change_is_fine(repo: ScratchRepo, tmp_path: Path) -> None:
    start(repo)
    pointer = repo.head()
    repo.git("update-index", "--add", "--cacheinfo", f"160000,{pointer},vendor/routes")
    repo.git("commit", "-q", "-m", "Vendor the routes")
    (repo.path / "vendor" / "routes").mkdir(parents=True)  # so that 'git add -A' keeps the gitlink
    note = demo.RATES + "\n\nNOTE = 'rates in euros'\n"
    repo.commit(machine("Note"), {"parcelkit/rates.py": note, "tests/test_note.py": NOTE_TEST})
    code, _report, output = check(repo, "HEAD~1..HEAD")
    assert code == 0, output
