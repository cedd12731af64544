"""The pytest child of the harness: the tree's paths last, pytest under coverage.py, how the session ended.

Started by :mod:`supervisor` as ``python -I session.py <records-fd> <settings-fd>``. Isolated mode
leaves the workspace off ``sys.path``; this module appends the tree's folders after the standard library
and the installed packages, so a ``json.py`` or a ``coverage/`` in the tree cannot replace them. The
settings arrive over a pipe that is read and closed before any test runs; the records leave over
another pipe, which no process the tests start inherits. After pytest returns, coverage.py's data is
saved and its digest sent, so a later change of the file (an exit handler, a process left behind) is
seen by the supervisor. Standard library, pytest and coverage.py only.
"""

from __future__ import annotations

import hashlib
import json
import os
import sys
from typing import Any


def read_settings(fd: int) -> dict[str, Any]:
    """Read the whole settings pipe and close it."""
    chunks = []
    with os.fdopen(fd, "rb") as stream:
        chunks.append(stream.read())
    value = json.loads(b"".join(chunks))
    if not isinstance(value, dict):
        raise SystemExit("harness settings are not an object")
    return value


def tree_path(workspace: str, folders: list[str], harness: str) -> list[str]:
    """``sys.path`` for the session: what isolated mode gave (standard library, installed packages),
    then the tree's folders, then the harness folder."""
    tail = [os.path.normpath(os.path.join(workspace, folder)) for folder in folders]
    return [entry for entry in sys.path if entry] + [*dict.fromkeys(tail), harness]


def shadowed_modules(names: list[str], workspace: str) -> dict[str, str]:
    """The tree's top-level modules that this interpreter would import from elsewhere (an installed copy
    found first on the path, or an import hook that serves it): then the tests would not run the committed
    code. Finding a spec runs no module code."""
    import importlib.util

    inside = os.path.realpath(workspace) + os.sep
    found = {}
    for name in names[:5000]:
        try:
            spec = importlib.util.find_spec(name)
        except (ImportError, ValueError):
            continue
        if spec is None:
            continue
        places = [spec.origin] if spec.origin else list(spec.submodule_search_locations or [])
        outside = [p for p in places if p and not os.path.realpath(p).startswith(inside)]
        if outside:
            found[name] = str(outside[0])[:300]
    return found


def file_digest(path: str) -> str | None:
    try:
        with open(path, "rb") as data:
            return hashlib.sha256(data.read()).hexdigest()
    except OSError:
        return None


def start_coverage(settings: dict[str, Any]) -> Any:
    """coverage.py started with the harness's rc file (None when the run does not measure)."""
    if not settings.get("measure"):
        return None
    import coverage

    cov = coverage.Coverage(config_file=settings["coveragerc"], data_file=settings["data_file"])
    cov.start()
    return cov


def finish_coverage(cov: Any, spread: bool, send: Any) -> None:
    """Save (and join the workers' files), then send the data file's digest."""
    if cov is None:
        return
    cov.stop()
    cov.save()
    path = cov.config.data_file
    if spread:  # the workers' files and this process's one, joined into the unsuffixed file (as `coverage combine`)
        import coverage

        combiner = coverage.Coverage(config_file=cov.config.config_file, data_file=path)
        combiner.combine(keep=False)
        combiner.save()
    send({"kind": "coverage", "sha256": file_digest(path)})


def main(argv: list[str]) -> int:
    records_fd, settings_fd = int(argv[1]), int(argv[2])
    os.set_inheritable(records_fd, False)  # subprocesses the tests start do not get the channel
    settings = read_settings(settings_fd)
    sys.path[:] = tree_path(os.getcwd(), list(settings.get("path", [])), settings["harness"])
    shadowed = shadowed_modules(list(settings.get("modules", [])), os.getcwd())
    cov = start_coverage(settings)
    import pytest

    recorder = __import__(settings["plugin"])
    send = recorder.pipe_writer(records_fd)
    if shadowed:
        send({"kind": "shadowed", "modules": shadowed})
    plugin = recorder.Recorder(send, settings.get("selection"))
    exit_code = int(pytest.main(list(settings["args"]), plugins=[plugin]))
    finish_coverage(cov, bool(settings.get("spread")), send)
    send({"kind": "end", "exit": exit_code})
    os.close(records_fd)
    return exit_code


if __name__ == "__main__":
    sys.exit(main(sys.argv))
