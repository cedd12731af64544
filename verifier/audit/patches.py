"""The span's patches: each commit's ``-U0`` hunks per file, read in bulk with ``git diff-tree --stdin``.

The flags and the reader are the gate's own (:data:`verifier.change.diff.COMMIT_PATCH_ARGS`,
:func:`verifier.change.diff.read_commit_patches`); this module only chooses what to ask for and spreads a
long list over the cores. Patches are kept (by :mod:`.history`, in the cache) as plain lists keyed by
their ``diff-tree`` input line: a sha names its content, so a patch never changes.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Sequence
from typing import Any

from verifier.audit.model import FilePatch
from verifier.change.diff import COMMIT_PATCH_ARGS, FileHunks, read_commit_patches, read_hunks
from verifier.gitio import Git

KEYS_PER_WORKER = 500  # fewer patches than this per core: one diff-tree is quicker than starting more


def patch_keys(sha: str, parents: str) -> list[str]:
    """``diff-tree --stdin`` lines: the commit alone (against its parent, or the empty tree), or one
    ``merge parent`` line per parent of a merge."""
    parent_list = parents.split()
    if len(parent_list) <= 1:
        return [sha]
    return [f"{sha} {parent}" for parent in parent_list]


def read_patches(git: Git, keys: list[str]) -> dict[str, list[Any]]:
    """Read the patches of ``keys``: git's diffs are most of a first audit's time and each ``diff-tree``
    uses one core, so a long list is split into one ``diff-tree`` per core, run side by side (their
    output is parsed as each finishes, while the others still run)."""
    workers = min(os.cpu_count() or 1, 4, len(keys) // KEYS_PER_WORKER)
    if workers <= 1:
        return _read_chunk(git, keys)
    from concurrent.futures import ThreadPoolExecutor

    size = -(-len(keys) // workers)
    chunks = [keys[start : start + size] for start in range(0, len(keys), size)]
    patches: dict[str, list[Any]] = {}
    with ThreadPoolExecutor(max_workers=len(chunks)) as pool:
        for found in pool.map(lambda chunk: _read_chunk(git, chunk), chunks):
            patches.update(found)
    return patches


def _read_chunk(git: Git, keys: list[str]) -> dict[str, list[Any]]:
    files = read_commit_patches(git.diff_commits(COMMIT_PATCH_ARGS, keys), len(keys))
    return {key: _encode(found) for key, found in zip(keys, files, strict=True)}


def parse_patch(lines: Sequence[str]) -> list[FilePatch]:
    """Read ``git diff -U0`` output given as text lines into files and hunks (the gate's reader)."""
    patch = "".join(f"{line}\n" for line in lines).encode("utf-8", "surrogateescape")
    return [FilePatch(*found) for found in read_hunks(patch)]


def _encode(files: list[FileHunks]) -> list[Any]:
    """Plain lists for the cache; paths interned, so marshal writes each path once."""
    return [[f.old_path and sys.intern(f.old_path), f.new_path and sys.intern(f.new_path), f.hunks] for f in files]
