"""The ``process`` sandbox: the command runs as an ordinary child process, limited but not isolated.

It gets a temp copy of the tree, the scrubbed environment it was given, rlimits, and its own session,
which is killed as a whole when the run ends or a limit is hit. It can still read and write whatever the
invoking user can, and reach the network; a policy has to allow it explicitly.
"""

from __future__ import annotations

import dataclasses
import os
import sys
from collections.abc import Callable

from verifier.models import Limits, SandboxRequest, SandboxResult
from verifier.sandbox import common


def _tasks_of_user(uid: int) -> int:
    """How many tasks (threads included, as RLIMIT_NPROC counts them) the user runs now."""
    count = 0
    for name in os.listdir("/proc"):
        try:
            if name.isdigit() and os.stat(f"/proc/{name}").st_uid == uid:
                count += len(os.listdir(f"/proc/{name}/task"))
        except OSError:
            continue
    return count


def process_limit(processes: int) -> int | None:
    """The RLIMIT_NPROC value for a child: outside a user namespace it counts all of the user's tasks.

    None for root, for whom the kernel does not enforce it.
    """
    uid = os.getuid()
    return None if uid == 0 else _tasks_of_user(uid) + processes


class ProcessBackend:
    """No isolation: a child process with rlimits, a scrubbed environment and a temp workspace."""

    name = "process"
    isolation = (
        "none: an ordinary child process with rlimits and a scrubbed environment; it can read and "
        "write what the user can and reach the network"
    )

    def problem(self) -> str | None:
        if not sys.platform.startswith("linux"):
            return f"needs Linux (this is {sys.platform}); use the docker sandbox"
        return None

    def for_repository(self, repo: str, base: str | None) -> ProcessBackend:
        return self

    def environment(self) -> str:
        return ""

    def facts(self) -> list[tuple[str, str]]:
        return [("runs as", f"uid {os.getuid()}, the invoking user")]

    def run(self, request: SandboxRequest) -> SandboxResult:
        common.check_tree(request)
        folder = common.make_temp_dir("process")
        try:
            workspace = folder / "workspace"
            common.copy_tree(request.tree, workspace)
            (folder / "home").mkdir()
            (folder / "tmp").mkdir()
            env = common.sandbox_env(request.env, str(folder / "home"), str(folder / "tmp"))
            outcome = common.supervise(
                [sys.executable, *request.python_args],
                cwd=str(workspace),
                env=env,
                limits=request.limits,
                preexec=_child_setup(request.limits),
                on_output=request.on_output,
            )
            files, too_large = common.collect_files(workspace, request.collect)
            outcome = dataclasses.replace(outcome, output=outcome.output + common.too_large_note(too_large))
            return common.sandbox_result(self.name, self.isolation, outcome, files)
        finally:
            common.remove_temp_dir(folder)


def _child_setup(limits: Limits) -> Callable[[], None]:
    """What the child does between fork and exec: die with us, then take on the limits."""
    parent = os.getpid()
    processes = process_limit(limits.processes)

    def setup() -> None:
        common.die_with_parent(parent)
        common.apply_limits(limits, processes)

    return setup
