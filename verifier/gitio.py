"""The one place that talks to git: plain ``git`` subprocesses with argument lists, never shell strings.

Every command runs with ``GIT_OPTIONAL_LOCKS=0`` so that reading never refreshes the user's index, and
nothing here writes to the repository (the gate's own notes ref is written by :mod:`verifier.report.notes`).
"""

from __future__ import annotations

import os
import subprocess
import tarfile
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

from verifier.errors import GitError, UsageError
from verifier.models import Commit

_FIELD = "\x1f"
_RECORD = "\x1e"


class Git:
    """A repository reached through the ``git`` command."""

    def __init__(self, repo: str | os.PathLike[str], index_file: str | None = None) -> None:
        """``index_file``: the index to read instead of the repository's own (a commit hook's
        ``GIT_INDEX_FILE``, which ``git commit -a`` points at a temporary index)."""
        self.repo = Path(repo)
        self.index_file = index_file
        self._env = {**os.environ, "GIT_OPTIONAL_LOCKS": "0", "GIT_TERMINAL_PROMPT": "0"}
        for leaking in ("GIT_DIR", "GIT_WORK_TREE", "GIT_INDEX_FILE", "GIT_DIFF_OPTS", "GIT_EXTERNAL_DIFF"):
            self._env.pop(leaking, None)
        if index_file:
            self._env["GIT_INDEX_FILE"] = index_file
        self._common_dir: Path | None = None  # asked once per object: it never changes

    def _spawn(self, args: Sequence[str], input: bytes | None = None) -> subprocess.CompletedProcess[bytes]:
        try:
            return subprocess.run(
                ["git", *args], cwd=self.repo, input=input, capture_output=True, env=self._env, check=False
            )
        except FileNotFoundError as error:
            if not self.repo.is_dir():
                raise UsageError(f"{self.repo} is not a folder", hint="give the repository's folder with -C") from error
            raise UsageError("git is not installed", hint="install git and run again") from error

    def run(self, args: Sequence[str], *, input: bytes | None = None, check: bool = True) -> bytes:
        """Run ``git args`` in the repository and return its standard output as bytes."""
        done = self._spawn(args, input)
        if check and done.returncode != 0:
            raise GitError(list(args), done.stderr.decode("utf-8", "replace"))
        return done.stdout

    def text(self, args: Sequence[str]) -> str:
        return self.run(args).decode("utf-8", "surrogateescape").strip()

    def ok(self, args: Sequence[str]) -> bool:
        return self._spawn(args).returncode == 0

    # -- locating -----------------------------------------------------------------------------
    def toplevel(self) -> Path:
        if not self.ok(["rev-parse", "--git-dir"]):
            raise UsageError(f"{self.repo} is not a git repository", hint="run verifier inside a git repository")
        top = self.run(["rev-parse", "--show-toplevel"], check=False).decode().strip()
        if not top:
            raise UsageError(f"{self.repo} has no working tree (a bare repository)", hint="run in a clone")
        return Path(top)

    def git_dir(self) -> Path:
        return Path(self.text(["rev-parse", "--absolute-git-dir"]))

    def common_dir(self) -> Path:
        if self._common_dir is None:
            self._common_dir = (self.repo / self.text(["rev-parse", "--git-common-dir"])).resolve()
        return self._common_dir

    def located(self) -> Git:
        """A Git at the top of this working tree, its common dir already known: one git call for both
        (a folder that is not a repository, or has no working tree, is reported as :meth:`toplevel` does)."""
        found = self.run(["rev-parse", "--show-toplevel", "--git-common-dir"], check=False)
        lines = found.decode("utf-8", "surrogateescape").splitlines()
        if len(lines) != 2 or not lines[0]:
            return Git(self.toplevel(), self.index_file)
        top = Git(lines[0], self.index_file)
        top._common_dir = (self.repo / lines[1]).resolve()
        return top

    def current_branch(self) -> str | None:
        """The short name of the checked-out branch; None on a detached HEAD."""
        return self.run(["symbolic-ref", "-q", "--short", "HEAD"], check=False).decode().strip() or None

    def has_commits(self) -> bool:
        return self.ok(["rev-parse", "--verify", "--quiet", "HEAD^{commit}"])

    def is_shallow(self) -> bool:
        return self.text(["rev-parse", "--is-shallow-repository"]) == "true"

    def empty_tree(self) -> str:
        return self.run(["hash-object", "-t", "tree", "--stdin"], input=b"").decode().strip()

    # -- revisions ----------------------------------------------------------------------------
    def resolve(self, rev: str) -> str:
        out = self.run(["rev-parse", "--verify", "--quiet", "--end-of-options", f"{rev}^{{commit}}"], check=False)
        sha = out.decode().strip()
        if not sha:
            raise UsageError(f"'{rev}' is not a commit in {self.repo}", hint="check the revision with git log")
        return sha

    def upstream(self) -> str | None:
        out = self.run(["rev-parse", "--abbrev-ref", "--symbolic-full-name", "@{upstream}"], check=False)
        return out.decode().strip() or None

    def merge_base(self, a: str, b: str) -> str | None:
        return self.run(["merge-base", a, b], check=False).decode().strip() or None

    def rev_list(self, exclude: str | None, include: str) -> list[str]:
        args = ["rev-list", "--topo-order", "--reverse", include]
        if exclude:
            args.append(f"^{exclude}")
        return self.run(args).decode().split()

    def commits(self, shas: Sequence[str]) -> list[Commit]:
        """Metadata and full messages of ``shas``, read in one ``git log`` call, in the order given."""
        if not shas:
            return []
        fmt = _FIELD.join(["%H", "%P", "%an <%ae>", "%cn <%ce>", "%B"]) + _RECORD
        out = self.run(["log", "--no-walk=unsorted", f"--format={fmt}", "--stdin"], input="\n".join(shas).encode())
        by_sha = {}
        for record in out.decode("utf-8", "replace").split(_RECORD):
            record = record.lstrip("\n")
            if not record:
                continue
            sha, parents, author, committer, message = record.split(_FIELD, 4)
            by_sha[sha] = Commit(sha, tuple(parents.split()), author, committer, message)
        return [by_sha[sha] for sha in shas if sha in by_sha]

    def touched_paths(self, shas: Sequence[str]) -> dict[str, list[str]]:
        """The paths each commit of ``shas`` touched against its first parent (old and new names of a rename),
        read in one ``git diff-tree --stdin`` call."""
        if not shas:
            return {}
        out = self.run(
            ["diff-tree", "--stdin", "-r", "-m", "--first-parent", "--root", "--no-renames", "--name-only", "-z"],
            input="\n".join(shas).encode() + b"\n",
        )
        touched: dict[str, list[str]] = {}
        current = None
        for field in out.decode("utf-8", "surrogateescape").split("\0"):
            if field in shas:
                current = field
                touched.setdefault(current, [])
            elif field and current is not None:
                touched[current].append(field.lstrip("\n"))
        return touched

    def commit_or_none(self, rev: str) -> str | None:
        """The commit ``rev`` names (a ref that may not exist yet, such as a notes ref), else None."""
        out = self.run(["rev-parse", "-q", "--verify", "--end-of-options", f"{rev}^{{commit}}"], check=False)
        return out.decode().strip() or None

    def newest_first_parent_before(self, rev: str, until: int) -> str | None:
        """The newest commit on the first-parent line of ``rev`` committed before ``until`` (epoch
        seconds, exclusive); None when there is none. A ``rev`` that is not a commit is a usage error."""
        ask = ["rev-list", "-1", "--first-parent", f"--until=@{until - 1}"]
        out = self.run([*ask, "--end-of-options", f"{rev}^{{commit}}", "--"], check=False)
        if not out.strip():
            out = self.run([*ask, self.resolve(rev)])
        return out.decode().strip() or None

    def log_span(self, end: str, since: int, until: int, notes_ref: str, fmt: str) -> bytes:
        """``git log`` of ``end``'s history committed in [since, until) (git's own bounds are inclusive and
        its walk may overshoot: check each commit's date), parents before children, in ``fmt`` with
        ``%N`` reading ``notes_ref``."""
        window = [f"--since=@{since}", f"--until=@{until - 1}"]
        return self.run(
            ["log", "--topo-order", "--reverse", f"--notes={notes_ref}", *window, f"--format={fmt}", end, "--"]
        )

    def log_named(self, names: Sequence[str], fmt: str) -> bytes:
        """``git log`` of exactly the commits ``names`` (full or abbreviated), in ``fmt``; unknown names are
        left out."""
        args = ["log", "--no-walk=unsorted", "--ignore-missing", f"--format={fmt}", "--stdin"]
        return self.run(args, input="".join(f"{name}\n" for name in names).encode(), check=False)

    def diff_commits(self, diff_args: Sequence[str], lines: Sequence[str]) -> bytes:
        """``git <diff_args>`` reading ``lines`` on its standard input (``diff-tree --stdin``: a commit, or
        ``commit parent``, per line); the diff's flags are :mod:`verifier.change.diff`'s."""
        return self.run(diff_args, input="".join(f"{line}\n" for line in lines).encode())

    def first_parent(self, sha: str) -> str | None:
        out = self.run(["rev-parse", "--verify", "--quiet", f"{sha}^1"], check=False)
        return out.decode().strip() or None

    # -- contents -----------------------------------------------------------------------------
    def show_file(self, rev: str | None, path: str) -> bytes | None:
        """The bytes of ``path`` at ``rev`` (None = the index), or None when it is not there."""
        spec = f":{path}" if rev is None else f"{rev}:{path}"
        done = self._spawn(["cat-file", "blob", spec])
        return done.stdout if done.returncode == 0 else None

    def read_blobs(self, specs: Sequence[str]) -> dict[str, bytes]:
        """Read many ``rev:path`` (or ``:path`` for the index) blobs in one ``git cat-file --batch``;
        specs that name no blob are left out."""
        if not specs:
            return {}
        out = self.run(["cat-file", "--batch"], input="".join(f"{spec}\n" for spec in specs).encode())
        blobs: dict[str, bytes] = {}
        offset = 0
        for spec in specs:
            header_end = out.index(b"\n", offset)
            header = out[offset:header_end].split()
            offset = header_end + 1
            if len(header) == 3 and header[1] == b"blob":
                size = int(header[2])
                blobs[spec] = out[offset : offset + size]
                offset += size + 1
        return blobs

    def diff(self, diff_args: Sequence[str], base: str, head: str | None) -> bytes:
        """Run a diff from ``base`` to ``head`` (None = the index)."""
        revs = [base, "--cached"] if head is None else [base, head]
        return self.run([*diff_args, *revs, "--"])

    def blame_porcelain(self, boundary: str | None, head: str, path: str, lines: Sequence[int]) -> bytes:
        """``git blame --porcelain`` of ``path`` at ``head`` for ``lines``, stopping at ``boundary``."""
        args = ["blame", "--porcelain", "-w", "-M", "-C"]  # -w: a whitespace-only edit keeps the line's author
        args += [f"-L{start},{end}" for start, end in _runs(lines)]
        args += [f"{boundary}..{head}" if boundary else head, "--", path]
        return self.run(args)

    # -- materialising ------------------------------------------------------------------------
    def export_commit(self, sha: str, dest: Path) -> None:
        """Write the tree of ``sha`` into ``dest`` (via ``git archive``; the working tree is untouched)."""
        dest.mkdir(parents=True, exist_ok=True)
        proc = subprocess.Popen(
            ["git", "archive", "--format=tar", sha], cwd=self.repo, stdout=subprocess.PIPE, env=self._env
        )
        assert proc.stdout is not None
        try:
            with tarfile.open(fileobj=proc.stdout, mode="r|") as archive:
                _extract_safely(archive, dest)
        finally:
            proc.stdout.close()
            if proc.wait() != 0:
                raise GitError(["archive", sha], "could not export the tree")

    def export_index(self, dest: Path) -> None:
        """Write the index's content into ``dest`` (via ``git checkout-index --prefix``)."""
        dest.mkdir(parents=True, exist_ok=True)
        self.run(["checkout-index", "--all", "--force", f"--prefix={dest}{os.sep}"])

    # -- notes ----------------------------------------------------------------------------------
    def note_blobs(self, ref: str) -> dict[str, str]:
        """commit sha -> the blob of its note under ``ref`` (``git notes list``); empty when none."""
        listing = self.run(["notes", f"--ref={ref}", "list"], check=False).decode().split()
        return dict(zip(listing[1::2], listing[::2], strict=True))

    def read_notes(self, ref: str) -> Iterator[tuple[str, str]]:
        """Yield (commit sha, note text) for every note under ``ref``."""
        listing = self.run(["notes", f"--ref={ref}", "list"], check=False).decode().split("\n")
        pairs = [line.split() for line in listing if line.strip()]
        if not pairs:
            return
        batch = self.run(["cat-file", "--batch"], input="\n".join(p[0] for p in pairs).encode() + b"\n")
        offset = 0
        for _note, commit in pairs:
            header_end = batch.index(b"\n", offset)
            size = int(batch[offset:header_end].split()[2])
            start = header_end + 1
            yield commit, batch[start : start + size].decode("utf-8", "replace")
            offset = start + size + 1


def _runs(lines: Sequence[int]) -> list[tuple[int, int]]:
    """Collapse sorted line numbers into inclusive (start, end) runs for ``git blame -L``."""
    runs: list[tuple[int, int]] = []
    for line in sorted(set(lines)):
        if runs and line == runs[-1][1] + 1:
            runs[-1] = (runs[-1][0], line)
        else:
            runs.append((line, line))
    return runs


def _extract_safely(archive: tarfile.TarFile, dest: Path) -> None:
    """Extract a git archive stream, refusing members that would land outside ``dest``."""
    root = dest.resolve()
    for member in archive:
        target = (root / member.name).resolve()
        if root != target and root not in target.parents:
            continue
        if member.isdev() or member.isfifo():
            continue
        archive.extract(member, root, set_attrs=True, **_filter_kwargs())


def _filter_kwargs() -> dict[str, Any]:
    # Python 3.12 warns without an explicit filter; "tar" keeps modes and symlinks inside the tree.
    return {"filter": "tar"} if hasattr(tarfile, "tar_filter") else {}
