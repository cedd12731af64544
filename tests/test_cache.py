"""The one cache module: entries under git's common dir (shared by linked worktrees), atomic writes, misses
on damage, and the caches of the who-tests-what map, the base results and the audit all in one place."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from verifier import cache
from verifier.demo.scratch import ScratchRepo
from verifier.gitio import Git


def test_entries_live_under_the_common_dir_shared_by_worktrees(tmp_path: Path) -> None:
    repo = ScratchRepo(tmp_path / "repo")
    repo.commit("Start", {"README.md": "x\n"})
    linked = tmp_path / "linked"
    repo.git("worktree", "add", "-q", "-b", "side", str(linked))
    # `git rev-parse --git-common-dir` (git itself) names the folder every worktree of a clone shares
    common = Path(repo.git("rev-parse", "--path-format=absolute", "--git-common-dir").strip())
    for where in (repo.path, linked):
        for kind in cache.KINDS:
            assert cache.folder(Git(where), kind) == common.resolve() / "verifier" / "cache" / kind
    with pytest.raises(ValueError):
        cache.folder(Git(repo.path), "elsewhere")


def test_a_write_is_atomic_and_leaves_no_temporary_file(tmp_path: Path) -> None:
    target = tmp_path / "kind" / "entry.json"
    cache.save_json(target, {"a": [1, 2]})
    cache.save_json(target, {"a": [3]})  # replaced whole, through os.replace
    assert cache.load_json(target) == {"a": [3]}
    assert [p.name for p in target.parent.iterdir()] == ["entry.json"]


def test_a_damaged_or_missing_entry_is_a_miss(tmp_path: Path) -> None:
    target = tmp_path / "entry.bin"
    assert cache.load_marshal(target) is None and cache.load_json(tmp_path / "none.json") is None
    cache.save_marshal(target, {"sha": ["a", 1]})
    assert cache.load_marshal(target) == {"sha": ["a", 1]}
    target.write_bytes(target.read_bytes()[:-2] + b"zz")  # the sha-1 in front no longer matches
    assert cache.load_marshal(target) is None
    (tmp_path / "bad.json").write_text("{half")
    assert cache.load_json(tmp_path / "bad.json") is None


def test_a_read_only_folder_only_costs_time(tmp_path: Path) -> None:
    folder = tmp_path / "ro"
    folder.mkdir()
    folder.chmod(0o500)
    try:
        if os.access(folder, os.W_OK):
            pytest.skip("running as a user who can write anywhere (root)")
        cache.save_marshal(folder / "entry.bin", [1])  # no exception: a cache that cannot be written is a miss
        assert cache.load_marshal(folder / "entry.bin") is None
    finally:
        folder.chmod(0o700)


def test_keep_newest_keeps_the_entries_in_use(tmp_path: Path) -> None:
    for number in range(4):
        path = tmp_path / f"span-{number}.bin"
        cache.save_marshal(path, [number])
        os.utime(path, (1000 + number, 1000 + number))
    (tmp_path / "lines-old.json").write_text("{}")
    assert cache.load_marshal(tmp_path / "span-0.bin") == [0]  # a read touches it: now the newest
    cache.keep_newest(tmp_path, "span-*.bin", 2, also_remove=("lines-*.json",))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["span-0.bin", "span-3.bin"]


def test_keys_are_content_hashes() -> None:
    assert cache.key("tree", "env") == cache.key(b"tree", "env") != cache.key("tree", "env2")
    assert len(cache.key("x")) == 40
