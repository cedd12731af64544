"""The one place that talks to git: plain ``git`` subprocesses with argument lists, never shell strings.

Every command runs with ``GIT_OPTIONAL_LOCKS=0`` so that reading never refreshes the user's index, and
nothing here writes to the repository (the gate's own notes ref is written by :mod:`verifier.report.notes`).

Names are data: every listing is read NUL-framed (``-z``) and every batch read is framed by object ids or
NUL-terminated input, so no byte a path may hold (newline, quote, non-UTF-8) shifts a record. A path is
kept as ``str`` decoded from git's bytes with ``surrogateescape`` (:func:`path_text`; like ``os.fsdecode``
on a UTF-8 system) and turned back into the same bytes with :func:`path_bytes` wherever it goes to git or
to the filesystem. Trees are materialised from object ids and blobs, never through ``git archive`` or a
checkout, so no git attribute (``export-ignore``, ``export-subst``, filters, end-of-line conversion)
changes what is tested.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import subprocess
import tempfile
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

from verifier.errors import CannotVerify, GitError, UsageError
from verifier.models import INDEX, Commit

_FIELD = "\x1f"
_RECORD = "\x1e"
MODE_FILE, MODE_EXECUTABLE, MODE_SYMLINK, MODE_GITLINK = "100644", "100755", "120000", "160000"
_BATCH_BYTES = 64 << 20  # blobs read per ``cat-file --batch`` call when a tree is materialised


def path_text(raw: bytes) -> str:
    """A path as git stores it (bytes) in the form the gate keeps it: str, undecodable bytes as surrogates."""
    return raw.decode("utf-8", "surrogateescape")


def path_bytes(path: str) -> bytes:
    """The inverse of :func:`path_text`: the exact bytes git has for ``path``."""
    return path.encode("utf-8", "surrogateescape")


@dataclass(frozen=True)
class TreeEntry:
    """One non-tree entry of a recursive tree listing: a blob (file or symlink) or a gitlink (submodule)."""

    mode: str
    kind: str  # "blob" or "commit"
    oid: str
    size: int  # bytes of the blob; 0 for a gitlink
    path: bytes


class Git:
    """A repository reached through the ``git`` command."""

    def __init__(self, repo: str | os.PathLike[str], index_file: str | None = None) -> None:
        """``index_file``: the index to read instead of the repository's own (a commit hook's
        ``GIT_INDEX_FILE``, which ``git commit -a`` points at a temporary index)."""
        self.repo = Path(repo)
        self.index_file = index_file
        self._env = {**os.environ, "GIT_OPTIONAL_LOCKS": "0", "GIT_TERMINAL_PROMPT": "0", "GIT_ATTR_NOSYSTEM": "1"}
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
        args = ["diff-tree", "--stdin", "-r", "-m", "--first-parent", "--root", "--no-renames", "--name-only"]
        out = self.run([*args, "-z", "--always"], input="\n".join(shas).encode() + b"\n")
        # With --always every commit given prints its id, in order, then the paths; a path equal to the
        # *next* commit's id would need that commit's id before it existed, so the framing cannot be faked.
        touched: dict[str, list[str]] = {}
        pending = list(dict.fromkeys(shas))
        current: str | None = None
        for field in out.split(b"\0"):
            if pending and field == pending[0].encode("ascii"):
                current = pending.pop(0)
                touched[current] = []
            elif field and current is not None:
                touched[current].append(path_text(field))
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
        """Read many ``rev:path`` (or ``:path`` for the index, or object id) blobs in one
        ``git cat-file --batch -z`` (NUL-terminated names: a path may hold a newline); specs that name
        no blob are left out."""
        if not specs:
            return {}
        wanted = [path_bytes(spec) for spec in specs]
        done = self._spawn(["cat-file", "--batch", "-z"], input=b"".join(spec + b"\0" for spec in wanted))
        if done.returncode == 0:
            out = done.stdout
        elif any(b"\n" in spec for spec in wanted):  # a git older than 2.38 has no -z for cat-file
            said = done.stderr.decode("utf-8", "replace").strip()
            raise CannotVerify(f"a path holds a newline and this git cannot batch-read it: {said}", "use git 2.38+")
        else:
            out = self.run(["cat-file", "--batch"], input=b"".join(spec + b"\n" for spec in wanted))
        blobs: dict[str, bytes] = {}
        offset = 0
        for spec, raw in zip(specs, wanted, strict=True):
            offset, kind, content = _batch_record(out, offset, raw)
            if kind == b"blob" and content is not None:
                blobs[spec] = content
        return blobs

    def read_objects(self, oids: Sequence[str]) -> dict[str, bytes]:
        """The content of the objects ``oids`` (hex ids: newline-safe input), in one ``cat-file --batch``."""
        if not oids:
            return {}
        out = self.run(["cat-file", "--batch"], input=b"".join(oid.encode("ascii") + b"\n" for oid in oids))
        found: dict[str, bytes] = {}
        offset = 0
        for oid in oids:
            offset, _kind, content = _batch_record(out, offset, oid.encode("ascii"))
            if content is None:
                raise GitError(["cat-file", "--batch"], f"object {oid} is missing from the repository")
            found[oid] = content
        return found

    def tree_entries(self, revision: str | None) -> list[TreeEntry]:
        """Every blob and gitlink of ``revision``'s tree (None: the index), read NUL-framed.

        An index with unmerged entries cannot be materialised: CannotVerify says so.
        """
        if revision is not None:
            out = self.run(["ls-tree", "-r", "-z", "--long", "--full-tree", revision])
            return [_tree_entry(record) for record in out.split(b"\0") if record]
        out = self.run(["ls-files", "--stage", "-z"])
        entries = []
        for record in out.split(b"\0"):
            if not record:
                continue
            meta, path = record.split(b"\t", 1)
            mode, oid, stage_number = meta.decode("ascii").split(" ")
            if stage_number != "0":
                raise CannotVerify(
                    f"the index has an unresolved merge conflict: {path_text(path)}",
                    "resolve the conflict and stage the result, then run the check again",
                )
            kind = "commit" if mode == MODE_GITLINK else "blob"
            entries.append(TreeEntry(mode, kind, oid, -1, path))
        return entries

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
    @contextlib.contextmanager
    def exported(self, revision: str, kind: str) -> Iterator[Path]:
        """``revision`` (a commit, or ``INDEX``) written into a new temporary folder outside the repository,
        removed when the block ends, whatever happens in it."""
        workdir = Path(tempfile.mkdtemp(prefix=f"verifier-{kind}-"))
        try:
            tree = workdir / "tree"
            if revision == INDEX:
                self.export_index(tree)
            else:
                self.export_commit(revision, tree)
            yield tree
        finally:
            shutil.rmtree(workdir, ignore_errors=True)

    def export_commit(self, sha: str, dest: Path) -> None:
        """Write the tree of ``sha`` into ``dest`` exactly as committed (no git attribute applies)."""
        self._materialise(sha, self.tree_entries(sha), dest)

    def export_index(self, dest: Path) -> None:
        """Write the index's content into ``dest`` exactly as staged (no filter or conversion applies)."""
        self._materialise(None, self.tree_entries(None), dest)

    def _materialise(self, revision: str | None, entries: list[TreeEntry], dest: Path) -> None:
        where = revision[:12] if revision else "the index"
        try:
            self._write_tree(where, entries, dest)
        except OSError as error:
            raise CannotVerify(
                f"the tree of {where} could not be written for the sandbox: {error}",
                "check the free space of the temp folder (TMPDIR); a tree git refuses to check out cannot be tested",
            ) from error

    def _write_tree(self, where: str, entries: list[TreeEntry], dest: Path) -> None:
        plan = [(entry, _safe_relative(entry.path, where)) for entry in entries]
        dest.mkdir(parents=True, exist_ok=True)
        blobs = [entry for entry, _ in plan if entry.kind == "blob"]
        links: list[tuple[bytes, bytes]] = []
        for batch in _batches(blobs):
            contents = self.read_objects([entry.oid for entry in batch])
            for entry in batch:
                target = os.path.join(os.fsencode(dest), _safe_relative(entry.path, where))
                if entry.mode == MODE_SYMLINK:
                    links.append((target, _checked_link(entry.path, contents[entry.oid], where)))
                else:
                    _write_file(target, contents[entry.oid], executable=entry.mode == MODE_EXECUTABLE)
        for entry, relative in plan:
            if entry.kind == "commit":  # a submodule: an empty folder, as a fresh clone without it has
                os.makedirs(os.path.join(os.fsencode(dest), relative), exist_ok=True)
        for target, link in links:  # last: no file is ever written through a link of the tree
            os.makedirs(os.path.dirname(target), exist_ok=True)
            os.symlink(link, target)
        root = os.path.realpath(os.fsencode(dest))
        for target, link in links:  # a chain of links can leave the tree where no single link does
            resolved = os.path.realpath(target)
            if resolved != root and not resolved.startswith(root + b"/"):
                raise _link_outside(target[len(os.fsencode(dest)) + 1 :], link, where)

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


def _batch_record(out: bytes, offset: int, asked: bytes) -> tuple[int, bytes | None, bytes | None]:
    """One record of ``cat-file --batch`` output at ``offset``: (next offset, type, content).

    A name git cannot resolve comes back as ``<name> missing`` (or ambiguous): matched against the exact
    bytes asked for, so a name holding a newline cannot pose as an object header.
    """
    for problem in (b" missing\n", b" ambiguous\n", b" dangling\n"):
        if out.startswith(asked + problem, offset):
            return offset + len(asked) + len(problem), None, None
    header_end = out.index(b"\n", offset)
    _oid, kind, size_text = out[offset:header_end].split(b" ")
    size = int(size_text)
    start = header_end + 1
    return start + size + 1, kind, out[start : start + size]


def _tree_entry(record: bytes) -> TreeEntry:
    """``<mode> SP <type> SP <oid> SP+ <size> TAB <path>`` of ``ls-tree --long -z``."""
    meta, path = record.split(b"\t", 1)
    mode, kind, oid, size = meta.decode("ascii").split()
    return TreeEntry(mode, kind, oid, 0 if size == "-" else int(size), path)


def _batches(entries: list[TreeEntry]) -> Iterator[list[TreeEntry]]:
    """Groups of entries of at most about ``_BATCH_BYTES`` of content (one large blob is its own group)."""
    batch: list[TreeEntry] = []
    total = 0
    for entry in entries:
        if batch and (total + max(entry.size, 0) > _BATCH_BYTES or len(batch) >= 5000):
            yield batch
            batch, total = [], 0
        batch.append(entry)
        total += max(entry.size, 0)
    if batch:
        yield batch


def _safe_relative(path: bytes, where: str) -> bytes:
    """``path`` as a relative path below the tree's root; refuse names git itself would not check out."""
    parts = path.split(b"/")
    if path.startswith(b"/") or any(part in (b"", b".", b"..") for part in parts):
        raise CannotVerify(
            f"{where} holds a path that cannot be written safely: {path_text(path)!r}",
            "the tree was written with a tool other than git; repair the commit",
        )
    return path


def _checked_link(path: bytes, target: bytes, where: str) -> bytes:
    """The target of the symlink ``path``; refuse one that leaves the tree (absolute, or too many '..')."""
    depth = path.count(b"/")  # folders between the tree's root and the link
    for part in target.split(b"/"):
        if part == b"..":
            depth -= 1
        elif part not in (b"", b"."):
            depth += 1
        if depth < 0:
            break
    if target.startswith(b"/") or depth < 0 or b"\0" in target or not target:
        raise _link_outside(path, target, where)
    return target


def _link_outside(path: bytes, target: bytes, where: str) -> CannotVerify:
    return CannotVerify(
        f"{where} holds a symbolic link that points outside the repository: "
        f"{path_text(path)!r} -> {path_text(target)!r}",
        "the sandbox runs only what the commit holds; make the link relative and inside the repository, "
        "or commit the file it points to",
    )


def _write_file(target: bytes, content: bytes, executable: bool) -> None:
    """Create ``target`` (and its folders) with ``content``; rw-r--r-- or rwxr-xr-x, as git checks out."""
    os.makedirs(os.path.dirname(target), exist_ok=True)
    mode = 0o755 if executable else 0o644
    handle = os.open(target, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_NOFOLLOW, mode)
    with os.fdopen(handle, "wb") as stream:
        stream.write(content)
    os.chmod(target, mode)  # exactly the mode git records, whatever the umask
