"""The who-tests-what map: which test executed which line of the base revision, cached by content.

The harness names coverage.py's dynamic context after the running test's pytest node id (and
``fixture:<name>`` while a fixture is set up), so one coverage run of the whole suite at base says, for
every measured line, which tests executed it; the empty context holds what ran outside any test (imports
during collection). The map also keeps each test's outcome at base (a differential run reads them) and
the fixtures each test used (a fixture's lines belong to every test that uses it).

Maps are cached through :mod:`verifier.cache` (kind ``impact``), one JSON file per key: the base
**tree** hash (content, not commit: a rebase that keeps the tree keeps the map) and the **environment**
(interpreter, installed distributions, sandbox backend and image, the policy's test settings, the
harness itself). The files are plain caches: deleting them costs one rebuild, never a wrong answer.
"""

from __future__ import annotations

import hashlib
import json
import platform
import sys
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from verifier import cache
from verifier.models import Policy, RunResult, Selection, TestProgress

if TYPE_CHECKING:
    from verifier.gitio import Git
    from verifier.sandbox import Backend

FORMAT = 1
IMPORT_TIME = ""  # coverage.py's context for lines run outside any test
FIXTURE = "fixture:"


@dataclass(frozen=True)
class ImpactMap:
    """Which tests executed which lines of one tree, in one environment."""

    tree: str
    environment: str
    outcomes: Mapping[str, str]  # node id -> outcome at base
    fixtures: Mapping[str, tuple[str, ...]]  # node id -> fixtures it used
    lines: Mapping[str, Mapping[int, tuple[str, ...]]]  # path -> line -> contexts that executed it

    def tests_for(self, contexts: Iterable[str]) -> set[str]:
        """The tests behind ``contexts``: node ids as they are, a fixture's context as every test using it."""
        tests: set[str] = set()
        fixtures: set[str] = set()
        for context in contexts:
            if context.startswith(FIXTURE):
                fixtures.add(context[len(FIXTURE) :])
            elif context != IMPORT_TIME:
                tests.add(context)
        if fixtures:
            tests |= {test for test, used in self.fixtures.items() if fixtures.intersection(used)}
        return tests

    def contexts_in(self, path: str, lines: Iterable[int]) -> set[str]:
        measured = self.lines.get(path, {})
        return {context for line in lines for context in measured.get(line, ())}

    def tests_in_file(self, path: str) -> set[str]:
        """Every test that executed any line of ``path``."""
        return self.tests_for(c for contexts in self.lines.get(path, {}).values() for c in contexts)

    def tests_defined_in(self, paths: Iterable[str]) -> set[str]:
        wanted = set(paths)
        return {test for test in self.outcomes if test.split("::", 1)[0] in wanted}


# -- building ---------------------------------------------------------------------------------------------------


def from_run(tree: str, environment: str, run: RunResult) -> ImpactMap | None:
    """The map a completed whole-suite run gives; None for a run that did not complete (a partial map lies)."""
    if run.status != "completed":
        return None
    lines = {path: dict(measured.contexts) for path, measured in run.coverage.items() if measured.contexts}
    return ImpactMap(
        tree=tree,
        environment=environment,
        outcomes={test.node_id: test.outcome for test in run.tests},
        fixtures={test.node_id: tuple(test.fixtures) for test in run.tests},
        lines=lines,
    )


def build(
    git: Git, revision: str, policy: Policy, backend: Backend, environment: str, on_test: TestProgress | None = None
) -> tuple[ImpactMap | None, RunResult]:
    """Run the whole suite at ``revision`` in the sandbox and make its map (None when the run failed);
    ``on_test``: per-test progress, for a display."""
    from verifier.testrun import harness as testrun

    everything = Selection(whole_suite=True)
    run = testrun.read_run(testrun.run_revision(git, revision, policy, everything, backend, on_test=on_test))
    return from_run(tree_of(git, revision), environment, run), run


def tree_of(git: Git, revision: str) -> str:
    return git.text(["rev-parse", f"{revision}^{{tree}}"])


def environment_key(policy: Policy, backend: Backend) -> str:
    """What besides the tree decides which lines the tests execute: interpreter, packages, sandbox, settings.

    The same for the commit hook, a manual check and CI on one interpreter with one set of packages: the
    distributions are read from the interpreter's own site folders (what the sandboxed tests import), not
    from this process's ``sys.path``, which the caller's folder, ``PYTHONPATH`` or a hook's doubled entries
    change; each folder is resolved once, and each distribution counts once by its normalised name."""
    from verifier.testrun import harness as testrun

    facts = {
        "format": FORMAT,
        "python": [sys.version, platform.python_implementation(), platform.machine()],
        "distributions": installed_distributions(),
        "backend": [backend.name, backend.environment()],
        "tests": [list(policy.test_paths), list(policy.pytest_args), list(policy.python_path)],
        "harness": testrun.harness_digest(),
    }
    return hashlib.sha256(json.dumps(facts, sort_keys=True).encode()).hexdigest()[:24]


def site_folders() -> list[str]:
    """The interpreter's site-packages folders (and the user's, when Python reads it), resolved, once each."""
    import os
    import site

    folders = list(site.getsitepackages())
    if site.ENABLE_USER_SITE:
        folders.append(site.getusersitepackages())
    resolved = (os.path.realpath(folder) for folder in folders if os.path.isdir(folder))
    return list(dict.fromkeys(resolved))


def installed_distributions() -> list[str]:
    """``name==version`` of every distribution in the site folders, names normalised as the packaging
    specifications do (PEP 503: runs of ``-``, ``_`` and ``.`` are one ``-``, lower case), sorted, unique."""
    import re
    from importlib import metadata

    found = set()
    for distribution in metadata.distributions(path=site_folders()):
        name = distribution.metadata["Name"] if distribution.metadata else None
        if name:
            found.add(f"{re.sub(r'[-_.]+', '-', name).lower()}=={distribution.version}")
    return sorted(found)


# -- the cache --------------------------------------------------------------------------------------------------


def cache_dir(git: Git) -> Path:
    """Outside the working tree: under git's common dir, so every worktree of a clone shares it."""
    return cache.folder(git, "impact")


def cache_file(git: Git, tree: str, environment: str) -> Path:
    return cache_dir(git) / f"{tree}-{environment}.json"


def load(git: Git, tree: str, environment: str) -> ImpactMap | None:
    """The cached map of ``tree`` in ``environment``; None when absent or unreadable (then it is rebuilt)."""
    data = cache.load_json(cache_file(git, tree, environment))
    try:
        return _decode(data) if isinstance(data, dict) and data.get("format") == FORMAT else None
    except (ValueError, KeyError, TypeError, IndexError, AttributeError):
        return None


def save(git: Git, impact: ImpactMap) -> Path:
    """Write the map atomically (a reader never sees half a file); return where it went."""
    target = cache_file(git, impact.tree, impact.environment)
    cache.save_json(target, _encode(impact))
    return target


def _encode(impact: ImpactMap) -> dict:
    """Contexts are stored once and referred to by index: a line executed by 500 tests costs 500 numbers."""
    labels: dict[str, int] = {}

    def index(label: str) -> int:
        return labels.setdefault(label, len(labels))

    lines = {
        path: {str(line): [index(c) for c in contexts] for line, contexts in measured.items()}
        for path, measured in impact.lines.items()
    }
    return {
        "format": FORMAT,
        "tree": impact.tree,
        "environment": impact.environment,
        "outcomes": dict(impact.outcomes),
        "fixtures": {test: list(used) for test, used in impact.fixtures.items() if used},
        "contexts": list(labels),
        "lines": lines,
    }


def _decode(data: Mapping) -> ImpactMap:
    labels = data["contexts"]
    lines = {
        path: {int(line): tuple(labels[i] for i in indices) for line, indices in measured.items()}
        for path, measured in data["lines"].items()
    }
    outcomes = dict(data["outcomes"])
    fixtures = {test: tuple(data["fixtures"].get(test, ())) for test in outcomes}
    return ImpactMap(data["tree"], data["environment"], outcomes, fixtures, lines)
