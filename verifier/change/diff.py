"""Turn git's diff output into FileChange records: paths, status, modes and the changed line numbers.

Pure functions over bytes, so they can be tested without running git. gitio runs
``git <DIFF_ARGS> BASE HEAD`` (the patch) and ``git <RAW_ARGS> BASE HEAD`` (a NUL-separated listing of
the same files in the same order) and hands both to :func:`parse_diff`. The audit reads many commits'
patches at once with ``git <COMMIT_PATCH_ARGS>`` (``diff-tree --stdin``, the same flags) and keeps only
each file's paths and hunk ranges: :func:`read_commit_patches` (the same header reader, no line lists).

unidiff reads the hunks. The file headers are read here instead: git's ``diff --git a/X b/Y`` line is
ambiguous when a path contains `` b/``, and unidiff keeps git's C-style quoting in the names. The
listing, when given, is authoritative for paths, status and modes; a mismatch with the patch means the
two outputs do not describe the same diff, and the gate refuses to guess.
"""

from __future__ import annotations

import os
import re
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, replace
from typing import NamedTuple

from verifier.errors import CannotVerify
from verifier.models import FileChange, FileStatus
from verifier.words import counted

# Command-line config wins over every config file, and the flags below pin what config could change:
# prefixes (diff.noprefix, diff.mnemonicPrefix), colour, external diff drivers, textconv, diff.relative,
# diff.renames (copy detection included), diff.orderFile, diff.interHunkContext, diff.submodule,
# diff.algorithm and diff.ignoreSubmodules. Git attributes are the change's own data (a ``.gitattributes``
# in the tree): ``--text`` keeps ``-diff`` / ``binary`` from hiding added lines, ``--no-textconv`` and
# ``--no-ext-diff`` keep a ``diff=`` driver from rewriting them, and the user's attributes file is off.
# Whether a file is binary is decided here from its bytes instead (:func:`_looks_binary`).
_CONFIG = (
    "-c",
    "core.quotePath=false",
    "-c",
    "diff.noprefix=false",
    "-c",
    "diff.mnemonicPrefix=false",
    "-c",
    f"core.attributesFile={os.devnull}",
)
_SELECTION = (
    "--no-color",
    "--no-ext-diff",
    "--no-textconv",
    "--no-relative",
    "-M",
    "--ignore-submodules=none",
    "-O/dev/null",
)
_PATCH_FORMAT = (
    "--patch",
    "--text",
    "--full-index",
    "-U0",
    "--inter-hunk-context=0",
    "--src-prefix=a/",
    "--dst-prefix=b/",
    "--diff-algorithm=myers",
)
DIFF_ARGS: tuple[str, ...] = (*_CONFIG, "diff", *_SELECTION, *_PATCH_FORMAT, "--full-index", "--submodule=short")
RAW_ARGS: tuple[str, ...] = (*_CONFIG, "diff", *_SELECTION, "--raw", "-z")
# one commit per input line (or ``merge parent``); --always prints a commit's sha line even when its diff is empty
COMMIT_PATCH_ARGS: tuple[str, ...] = (
    *_CONFIG,
    "diff-tree",
    "--stdin",
    "--always",
    "--root",
    "-r",
    *_SELECTION,
    *_PATCH_FORMAT,
)

_GIT_HEADER = b"diff --git "
_HUNK_HEADER = b"@@ "
_DEV_NULL = b"/dev/null"
_NO_MODE = "000000"
GITLINK_MODE = "160000"  # a submodule: the commit of another repository, no lines of this one
_HEADER_KEYS = (
    b"old mode ",
    b"new mode ",
    b"deleted file mode ",
    b"new file mode ",
    b"similarity index ",
    b"dissimilarity index ",
    b"rename from ",
    b"rename to ",
    b"copy from ",
    b"copy to ",
    b"index ",
    b"--- ",
    b"+++ ",
    b"Binary files ",
    b"GIT binary patch",
)
_HUNK_RANGES = re.compile(rb"@@ -(\d+)(?:,(\d+))? \+(\d+)(?:,(\d+))? @@")
_COMMIT_LINE = re.compile(
    rb"^[0-9a-f]{40}\n", re.MULTILINE
)  # never a patch line: those start with a header word, @, +, - or space
_INDEX_MODE = re.compile(rb"[0-9a-f]+\.\.[0-9a-f]+(?: ([0-7]{6}))?")
# git's C-style quoting (quote.c): these letters after a backslash, or three octal digits for a byte
_OCTAL = re.compile(rb"[0-7]{3}")
_ESCAPES = {ord(k): v for k, v in {"a": 7, "b": 8, "t": 9, "n": 10, "v": 11, "f": 12, "r": 13}.items()}
_ESCAPES.update({ord('"'): ord('"'), ord("\\"): ord("\\")})
_LISTED_STATUS: dict[str, FileStatus] = {
    "A": "added",
    "M": "modified",
    "D": "deleted",
    "R": "renamed",
    "C": "copied",
    "T": "type-changed",
}
_HINT = "this git output could not be read safely; report it with the git version and the diff that failed"


class FileHunks(NamedTuple):
    """One file of a ``-U0`` patch: its paths (None for /dev/null) and its hunks, flat: old start, old
    count, new start, new count, then the next hunk's four numbers (the audit's cache stores them so)."""

    old_path: str | None
    new_path: str | None
    hunks: list[int]


@dataclass(frozen=True)
class _Listed:
    """One entry of the ``--raw -z`` listing."""

    status: FileStatus
    path: str
    old_path: str | None
    old_mode: str | None
    new_mode: str | None


def parse_diff(patch: bytes, listing: bytes | None = None) -> tuple[FileChange, ...]:
    """Read the output of ``git <DIFF_ARGS>`` (and, if given, ``git <RAW_ARGS>``) into FileChanges."""
    changes = _join_type_changes([_read_section(section) for section in _sections(patch)])
    if listing is None:
        return tuple(changes)
    return tuple(_apply_listing(changes, _read_listing(listing)))


def read_hunks(patch: bytes) -> list[FileHunks]:
    """Each file of ``git diff -U0`` output with its hunk ranges, read by the same header reader as
    :func:`parse_diff` (content lines are never taken for headers: they all start with a prefix)."""
    return [_section_hunks(section) for section in _sections(patch)]


def read_commit_patches(output: bytes, count: int) -> list[list[FileHunks]]:
    """Split ``git <COMMIT_PATCH_ARGS>`` output into the ``count`` commits asked for, each one's files."""
    parts = _COMMIT_LINE.split(output)
    if len(parts) != count + 1 or parts[0].strip():
        raise _refuse(
            f"git diff-tree gave {counted(len(parts) - 1, 'patch', 'patches')} for {counted(count, 'commit')}"
        )
    return [read_hunks(part) for part in parts[1:]]


def _section_hunks(section: list[bytes]) -> FileHunks:
    first_hunk = next((i for i, line in enumerate(section) if line.startswith(_HUNK_HEADER)), len(section))
    old_path, new_path = _header_paths(
        section[0][len(_GIT_HEADER) :].rstrip(b"\n"), _header_fields(section[1:first_hunk])
    )
    hunks: list[int] = []
    for line in section[first_hunk:]:
        if line.startswith(_HUNK_HEADER):
            found = _HUNK_RANGES.match(line)
            if found is None:
                raise _refuse(f"cannot read the hunk header {_decode(line).rstrip()!r}")
            old_start, old_count, new_start, new_count = found.groups()
            hunks += (int(old_start), 1 if old_count is None else int(old_count))
            hunks += (int(new_start), 1 if new_count is None else int(new_count))
    return FileHunks(
        None if old_path is None else _decode(old_path), None if new_path is None else _decode(new_path), hunks
    )


def _refuse(problem: str) -> CannotVerify:
    return CannotVerify(f"cannot read git's diff output: {problem}", _HINT)


def _decode(raw: bytes) -> str:
    # surrogateescape keeps non-UTF-8 bytes of paths and contents round-trippable, like os.fsdecode
    return raw.decode("utf-8", "surrogateescape")


def _lines(data: bytes) -> list[bytes]:
    """Split on LF only, keeping it: CR and other separators are content (CRLF files, odd paths)."""
    parts = data.split(b"\n")
    lines = [part + b"\n" for part in parts[:-1]]
    if parts[-1]:
        lines.append(parts[-1])
    return lines


def _sections(patch: bytes) -> Iterator[list[bytes]]:
    """Yield each file's lines; a hunk body line always starts with ' ', '+', '-' or '\\', never 'diff'."""
    section: list[bytes] = []
    for number, line in enumerate(_lines(patch), 1):
        if line.startswith(_GIT_HEADER):
            if section:
                yield section
            section = [line]
        elif section:
            section.append(line)
        elif line.startswith(b"* Unmerged path "):
            raise CannotVerify(
                f"the index has an unresolved merge conflict: {_decode(line[16:]).rstrip()}",
                "resolve the conflict and stage the result, then run the check again",
            )
        elif line.strip():
            raise _refuse(f"line {number} is not part of any file: {_decode(line).rstrip()!r}")
    if section:
        yield section


def _read_section(section: list[bytes]) -> FileChange:
    """One file: its header says the paths, status and modes; its hunks say the lines."""
    first_hunk = next((i for i, line in enumerate(section) if line.startswith(_HUNK_HEADER)), len(section))
    header = _header_fields(section[1:first_hunk])
    old_path, new_path = _header_paths(section[0][len(_GIT_HEADER) :].rstrip(b"\n"), header)
    path = new_path if new_path is not None else old_path
    if path is None:
        raise _refuse(f"no path on either side of 'diff --git {_decode(section[0][11:]).rstrip()}'")
    binary = b"Binary files " in header or b"GIT binary patch" in header or _looks_binary(section[first_hunk:])
    added, removed = ((), ()) if binary else _changed_lines(section[first_hunk:], _decode(path))
    status = _header_status(header)
    old_mode, new_mode = _header_modes(header)
    if old_mode == GITLINK_MODE:
        removed = ()
    if new_mode == GITLINK_MODE:
        added = ()
    return FileChange(
        path=_decode(path),
        old_path=None if old_path is None else _decode(old_path),
        status=status,
        binary=binary,
        old_mode=None if status == "added" else old_mode,
        new_mode=None if status == "deleted" else new_mode,
        added_lines=added,
        removed_lines=removed,
    )


def _looks_binary(hunks: list[bytes]) -> bool:
    """A NUL byte in the changed lines: git's own test for binary content (a NUL in the first 8000 bytes,
    xdiff-interface.c, from memory), applied to what the diff shows, whatever the attributes say.
    Python refuses source holding a NUL byte, so no runnable Python line hides behind this."""
    return any(b"\0" in line for line in hunks)


def _header_fields(lines: Sequence[bytes]) -> dict[bytes, bytes]:
    fields: dict[bytes, bytes] = {}
    for line in lines:
        text = line.rstrip(b"\n")
        key = next((k for k in _HEADER_KEYS if text.startswith(k)), None)
        if key is None:
            raise _refuse(f"unexpected line in a file header: {_decode(text)!r}")
        fields[key] = text[len(key) :]
    return fields


def _header_status(header: dict[bytes, bytes]) -> FileStatus:
    if b"new file mode " in header:
        return "added"
    if b"deleted file mode " in header:
        return "deleted"
    if b"rename from " in header:
        return "renamed"
    if b"copy from " in header:
        return "copied"
    return "modified"


def _header_modes(header: dict[bytes, bytes]) -> tuple[str | None, str | None]:
    """Modes from 'old/new mode', 'new/deleted file mode', else the index line (a pure rename has none)."""
    index = _INDEX_MODE.fullmatch(header.get(b"index ", b""))
    shared = index.group(1).decode() if index and index.group(1) else None
    old = header.get(b"old mode ") or header.get(b"deleted file mode ")
    new = header.get(b"new mode ") or header.get(b"new file mode ")
    return (old.decode() if old else shared), (new.decode() if new else shared)


def _header_paths(names: bytes, header: dict[bytes, bytes]) -> tuple[bytes | None, bytes | None]:
    """(base path, head path); None stands for /dev/null. Unambiguous sources first."""
    for source, target in ((b"rename from ", b"rename to "), (b"copy from ", b"copy to ")):
        if source in header and target in header:
            return _quoted_or_plain(header[source]), _quoted_or_plain(header[target])
    if b"--- " in header and b"+++ " in header:
        return _patch_line_path(header[b"--- "], b"a/"), _patch_line_path(header[b"+++ "], b"b/")
    path = _same_path(names)
    old = None if b"new file mode " in header else path
    return old, (None if b"deleted file mode " in header else path)


def _patch_line_path(value: bytes, prefix: bytes) -> bytes | None:
    """The path of a '---' or '+++' line; git adds a tab after a name that contains a space."""
    if value == _DEV_NULL:
        return None
    if value.startswith(b'"'):
        name, rest = _unquote(value)
        if rest not in (b"", b"\t"):
            raise _refuse(f"unexpected text after a quoted file name: {_decode(value)!r}")
    else:
        name = value.removesuffix(b"\t")
    if not name.startswith(prefix):
        raise _refuse(f"file name {_decode(value)!r} lacks the {_decode(prefix)!r} prefix")
    return name[len(prefix) :]


def _same_path(names: bytes) -> bytes:
    """The path of 'a/P b/P' (same P both sides, as in every header that lacks rename or --- lines)."""
    if names.startswith(b'"'):
        first, rest = _unquote(names)
        second = _unquote(rest[1:])[0] if rest.startswith(b' "') else rest[1:]
    else:
        middle = len(names) // 2
        first, second = names[:middle], names[middle + 1 :]
        if names[middle : middle + 1] != b" ":
            second = b""
    if not (first.startswith(b"a/") and second.startswith(b"b/") and first[2:] == second[2:]):
        raise _refuse(f"cannot tell the paths apart in 'diff --git {_decode(names)}'")
    return first[2:]


def _quoted_or_plain(value: bytes) -> bytes:
    if not value.startswith(b'"'):
        return value
    name, rest = _unquote(value)
    if rest:
        raise _refuse(f"unexpected text after a quoted file name: {_decode(value)!r}")
    return name


def _unquote(text: bytes) -> tuple[bytes, bytes]:
    """Undo git's C-style quoting of ``text`` (which starts with '"'); return the name and what follows."""
    out = bytearray()
    i = 1
    while i < len(text):
        char = text[i]
        if char == ord('"'):
            return bytes(out), text[i + 1 :]
        if char != ord("\\"):
            out.append(char)
            i += 1
        elif _OCTAL.fullmatch(text[i + 1 : i + 4]):
            out.append(int(text[i + 1 : i + 4], 8))
            i += 4
        elif i + 1 < len(text) and text[i + 1] in _ESCAPES:
            out.append(_ESCAPES[text[i + 1]])
            i += 2
        else:
            break
    raise _refuse(f"badly quoted file name: {_decode(text)!r}")


def _changed_lines(hunks: list[bytes], where: str) -> tuple[tuple[int, ...], tuple[int, ...]]:
    """Head numbers of the '+' lines and base numbers of the '-' lines, read by unidiff."""
    if not hunks:
        return (), ()
    from unidiff import PatchSet  # here: the audit reads hunk ranges only, and its warm runs skip this import
    from unidiff.errors import UnidiffParseError

    # a neutral header: the real names were read above and could confuse unidiff's own name handling
    text = ["--- a/file\n", "+++ b/file\n", *(_decode(line) for line in hunks)]
    try:
        patched = PatchSet(text)
    except UnidiffParseError as exc:
        raise _refuse(f"the hunks of {where!r} are malformed ({exc})") from exc
    added: list[int] = []
    removed: list[int] = []
    for hunk in patched[0]:
        added.extend(line.target_line_no for line in hunk if line.is_added and line.target_line_no is not None)
        removed.extend(line.source_line_no for line in hunk if line.is_removed and line.source_line_no is not None)
    return tuple(added), tuple(removed)


def _join_type_changes(changes: list[FileChange]) -> list[FileChange]:
    """git prints a type change (file <-> symlink <-> submodule) as a deletion then a creation of one path."""
    joined: list[FileChange] = []
    for change in changes:
        before = joined[-1] if joined else None
        if before and before.status == "deleted" and change.status == "added" and before.path == change.path:
            joined[-1] = FileChange(
                path=change.path,
                old_path=before.path,
                status="type-changed",
                binary=before.binary or change.binary,
                old_mode=before.old_mode,
                new_mode=change.new_mode,
                added_lines=change.added_lines,
                removed_lines=before.removed_lines,
            )
        else:
            joined.append(change)
    return joined


def _read_listing(listing: bytes) -> list[_Listed]:
    """Entries of ``--raw -z``: ':old_mode new_mode old_sha new_sha STATUS' NUL path [NUL path] NUL."""
    fields = listing.split(b"\0")
    if fields[-1] == b"":
        fields.pop()
    entries: list[_Listed] = []
    i = 0
    while i < len(fields):
        meta = _decode(fields[i]).split(" ")
        letter = meta[4][:1] if len(meta) == 5 and meta[0].startswith(":") else ""
        if letter == "U":
            raise CannotVerify(
                f"the index has an unresolved merge conflict: {_decode(fields[i + 1])}",
                "resolve the conflict and stage the result, then run the check again",
            )
        if letter not in _LISTED_STATUS:
            raise _refuse(f"unexpected entry in the file listing: {_decode(fields[i])!r}")
        count = 2 if letter in "RC" else 1
        paths = [_decode(p) for p in fields[i + 1 : i + 1 + count]]
        if len(paths) != count:
            raise _refuse("the file listing ends in the middle of an entry")
        entries.append(_listed(_LISTED_STATUS[letter], meta[0][1:], meta[1], paths))
        i += 1 + count
    return entries


def _listed(status: FileStatus, old_mode: str, new_mode: str, paths: list[str]) -> _Listed:
    return _Listed(
        status=status,
        path=paths[-1],
        old_path=None if status == "added" else paths[0],
        old_mode=None if old_mode == _NO_MODE else old_mode,
        new_mode=None if new_mode == _NO_MODE else new_mode,
    )


def _apply_listing(changes: list[FileChange], listed: list[_Listed]) -> list[FileChange]:
    """Check the patch against the listing, file by file, and take the modes from the listing."""
    if len(changes) != len(listed):
        raise _refuse(f"the patch has {counted(len(changes), 'file')} but the listing has {len(listed)}")
    result = []
    for change, entry in zip(changes, listed, strict=True):
        seen = (change.status, change.path, change.old_path)
        if seen != (entry.status, entry.path, entry.old_path):
            raise _refuse(f"the patch shows {seen} where the listing shows {entry}")
        result.append(replace(change, old_mode=entry.old_mode, new_mode=entry.new_mode))
    return [_without_gitlink_lines(change) for change in result]


def _without_gitlink_lines(change: FileChange) -> FileChange:
    """A submodule side has no lines of this repository ('Subproject commit ...' is git's notation)."""
    removed = () if change.old_mode == GITLINK_MODE else change.removed_lines
    added = () if change.new_mode == GITLINK_MODE else change.added_lines
    return replace(change, added_lines=added, removed_lines=removed)
