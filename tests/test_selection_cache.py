"""One who-tests-what map, reused: the environment key does not depend on how the verifier was started,
and concurrent runs share the cache without a reader ever seeing half a map."""

from __future__ import annotations

import os
import site
import subprocess
import sys
import threading

from conftest import ROOT

from verifier.demo.scratch import ScratchRepo
from verifier.gitio import Git
from verifier.models import Policy
from verifier.selection import impactmap
from verifier.selection.impactmap import ImpactMap

KEY_SCRIPT = """
from verifier import sandbox
from verifier.models import Policy
from verifier.selection import impactmap
print(impactmap.environment_key(Policy(source="default"), sandbox.load("process")))
"""


def key_from(cwd: str, python_path: str) -> str:
    done = subprocess.run(
        [sys.executable, "-c", KEY_SCRIPT],
        cwd=cwd,
        capture_output=True,
        text=True,
        env={**os.environ, "PYTHONPATH": python_path},
        check=True,
    )
    return done.stdout.strip()


def test_the_environment_key_is_the_same_whatever_folder_and_path_list_the_caller_has(tmp_path):
    packages = site.getsitepackages()[0]
    plain = key_from(str(tmp_path), str(ROOT))
    # A commit hook's interpreter may list site-packages twice (once with a trailing slash, once through a
    # link) and start in the repository: the same interpreter and packages, the same key.
    link = tmp_path / "site-link"
    link.symlink_to(packages)
    doubled = os.pathsep.join([str(ROOT), packages, packages + "/", str(link), str(ROOT) + "/."])
    assert key_from(str(ROOT), doubled) == plain
    assert len(plain) == 24


def test_the_environment_key_follows_the_policys_test_settings():
    from verifier import sandbox

    backend = sandbox.load("process")
    default = impactmap.environment_key(Policy(source="default"), backend)
    assert impactmap.environment_key(Policy(source="default", pytest_args=("-x",)), backend) != default
    assert impactmap.environment_key(Policy(source="default"), backend) == default


def test_distributions_count_once_by_their_normalised_name():
    names = impactmap.installed_distributions()
    assert names == sorted(set(names))
    # PEP 503 normalisation: lower case, runs of "-", "_" and "." as one "-"
    assert all(name.split("==")[0] == name.split("==")[0].lower() for name in names)
    assert any(name.startswith("pytest==") for name in names)


def big_map(label: str) -> ImpactMap:
    tests = [f"tests/test_{label}.py::test_{n}" for n in range(300)]
    lines = {f"src/m{f}.py": {line: tuple(tests[line % 50 :: 7]) for line in range(1, 200)} for f in range(20)}
    return ImpactMap("0" * 40, "env", dict.fromkeys(tests, "passed"), dict.fromkeys(tests, ()), lines)


def test_concurrent_writers_and_readers_of_one_map_never_see_half_a_file(tmp_path):
    repo = ScratchRepo(tmp_path / "repo")
    repo.commit("start", {"a.py": "A = 1\n"})
    git = Git(repo.path)
    maps = [big_map("one"), big_map("two")]
    expected = [dict(m.outcomes) for m in maps]
    errors: list[str] = []

    def write(impact: ImpactMap) -> None:
        for _ in range(15):
            impactmap.save(git, impact)

    writers = [threading.Thread(target=write, args=(m,)) for m in maps]
    for writer in writers:
        writer.start()
    while any(writer.is_alive() for writer in writers):
        loaded = impactmap.load(git, "0" * 40, "env")
        if loaded is not None and (dict(loaded.outcomes) not in expected or len(loaded.lines) != 20):
            errors.append("a reader saw a map neither writer wrote")
    for writer in writers:
        writer.join()
    assert not errors
    final = impactmap.load(git, "0" * 40, "env")
    assert final is not None and dict(final.outcomes) in expected
    leftovers = [p.name for p in impactmap.cache_dir(git).iterdir() if p.name.startswith(".tmp-")]
    assert leftovers == []  # every temporary file was renamed onto the map
