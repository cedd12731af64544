"""The gate's one cache: files keyed by content, under git's common dir, written atomically, safe to delete.

Every cache of the project lives in ``<git common dir>/verifier/cache/<kind>/`` (every worktree of a clone
shares it): the who-tests-what maps (``impact``), the base results of a differential run (``baseline``)
and the audit's patches, spans, notes and policy facts (``audit``). A file's name is its key, made of
content hashes (trees, commits, a notes ref's tip, the code that computed it), so an entry is never
updated in place: a new key is a new file.

Writes go to a temporary file in the same folder and then ``os.replace`` it onto the name (atomic on
POSIX and Windows: a reader sees the old file or the new one, never half of one). A file that cannot be
read, or (for the checksummed marshal files) whose sha-1 does not match its body, is a miss: the caller
computes the value again. A cache that cannot be written (a read-only git dir) only costs time.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import marshal
import os
from collections.abc import Iterable
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from verifier.gitio import Git

KINDS = ("impact", "baseline", "census", "audit")
_CHECKSUM = 20  # bytes of the sha-1 written before a marshal body


def folder(git: Git, kind: str) -> Path:
    """The folder of one kind of cache entry (not created here: a write creates it)."""
    if kind not in KINDS:
        raise ValueError(f"unknown cache kind {kind!r}; one of {', '.join(KINDS)}")
    return git.common_dir() / "verifier" / "cache" / kind


def key(*parts: str | bytes) -> str:
    """A sha-1 hex digest of ``parts`` (joined by newlines): the content key of an entry."""
    digest = hashlib.sha1()
    for index, part in enumerate(parts):
        if index:
            digest.update(b"\n")
        digest.update(part.encode("utf-8", "surrogateescape") if isinstance(part, str) else part)
    return digest.hexdigest()


def write_atomic(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a temporary file in the same folder and ``os.replace``."""
    import tempfile  # only when writing: its imports cost a warm audit's start-up

    path.parent.mkdir(parents=True, exist_ok=True)
    handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=".tmp-")
    try:
        with os.fdopen(handle, "wb") as out:
            out.write(data)
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise


def save_json(path: Path, value: Any) -> None:
    """Keep ``value`` as compact JSON (for entries other programs may read: maps, base results)."""
    write_atomic(path, json.dumps(value, separators=(",", ":")).encode("utf-8"))


def load_json(path: Path) -> Any:
    """The JSON value of ``path``; None when it is missing or not JSON."""
    try:
        return json.loads(path.read_bytes())
    except (OSError, ValueError):
        return None


def save_marshal(path: Path, value: Any) -> None:
    """Keep plain values (lists, dicts, strings, numbers) in marshal form, the fastest to read back, with
    the sha-1 of the body in front; a failure to write is ignored (the cache only saves time)."""
    body = marshal.dumps(value)
    with contextlib.suppress(OSError):
        write_atomic(path, hashlib.sha1(body).digest() + body)


def load_marshal(path: Path) -> Any:
    """The values kept by :func:`save_marshal`; None when missing or damaged. A file read is touched, so
    that :func:`keep_newest` keeps the entries in use."""
    try:
        raw = path.read_bytes()
    except OSError:
        return None
    body = memoryview(raw)[_CHECKSUM:]
    if len(raw) < _CHECKSUM or hashlib.sha1(body).digest() != raw[:_CHECKSUM]:
        return None
    with contextlib.suppress(OSError):
        os.utime(path)
    try:
        return marshal.loads(body)
    except (EOFError, ValueError, TypeError):
        return None


def keep_newest(where: Path, pattern: str, count: int, also_remove: Iterable[str] = ()) -> None:
    """Let ``where`` hold only the ``count`` most recently used files matching ``pattern`` (and none
    matching the patterns ``also_remove``: entries of an older layout that nothing reads any more)."""
    with contextlib.suppress(OSError):
        kept = sorted(where.glob(pattern), key=lambda p: p.stat().st_mtime, reverse=True)
        stale = [p for old in also_remove for p in where.glob(old)]
        for old in [*kept[count:], *stale]:
            old.unlink(missing_ok=True)
