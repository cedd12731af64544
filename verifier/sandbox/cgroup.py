"""A memory limit for a whole sandbox run (every process of it together), from a delegated cgroup v2.

rlimits bound each process alone; a run that forks many children can together use far more. Where the
unified hierarchy (cgroup v2) is mounted at /sys/fs/cgroup and the cgroup *beside* ours (a child of our
parent) may be created by us, with the memory controller enabled there (systemd's delegation of a user
session, or root), the namespace backend puts its init into a fresh cgroup with ``memory.max`` and
``memory.swap.max = 0``, reads ``memory.events`` afterwards to tell an out-of-memory kill, and removes the
cgroup. Where that is not possible, :func:`whole_run_problem` says why (``verifier sandbox doctor`` shows
it) and each process keeps only its own rlimit. Only the standard library is used.
"""

from __future__ import annotations

import contextlib
import os
import time
import uuid
from pathlib import Path

ROOT = Path("/sys/fs/cgroup")


def _own_cgroup() -> Path | None:
    """Our cgroup in the unified hierarchy (the ``0::`` line of /proc/self/cgroup), if v2 is mounted."""
    if not (ROOT / "cgroup.controllers").is_file():
        return None
    try:
        lines = Path("/proc/self/cgroup").read_text().splitlines()
    except OSError:
        return None
    for line in lines:
        if line.startswith("0::"):
            return ROOT / line[3:].lstrip("/")
    return None


def _where_to_create() -> tuple[Path | None, str]:
    """The cgroup under which a run's cgroup can be made, or None and why not."""
    own = _own_cgroup()
    if own is None:
        return None, "cgroup v2 is not mounted at /sys/fs/cgroup with this process in it"
    parent = own if own == ROOT else own.parent  # a non-root cgroup with processes cannot have children
    try:
        enabled = (parent / "cgroup.subtree_control").read_text().split()
    except OSError as error:
        return None, f"cannot read {parent}/cgroup.subtree_control: {error.strerror}"
    if "memory" not in enabled:
        return None, f"the memory controller is not delegated to {parent}"
    if not os.access(parent, os.W_OK) or not os.access(parent / "cgroup.procs", os.W_OK):
        return None, f"{parent} is not writable by this user (no cgroup delegation)"
    return parent, ""


def whole_run_problem() -> str | None:
    """None when a run's memory can be limited as a whole here, else why not."""
    return _where_to_create()[1] or None


class RunGroup:
    """One run's cgroup: made with its limits, joined by the run's first process, removed at the end."""

    def __init__(self, path: Path) -> None:
        self.path = path

    @classmethod
    def create(cls, memory_bytes: int) -> RunGroup | None:
        """A fresh cgroup limited to ``memory_bytes`` (no swap), or None where that is not possible."""
        parent, _why = _where_to_create()
        if parent is None:
            return None
        path = parent / f"verifier-run-{os.getpid()}-{uuid.uuid4().hex[:8]}"
        try:
            path.mkdir()
        except OSError:
            return None
        group = cls(path)
        try:
            (path / "memory.max").write_text(f"{memory_bytes}\n")
            with contextlib.suppress(FileNotFoundError):  # no swap accounting on this kernel: no swap to limit
                (path / "memory.swap.max").write_text("0\n")
        except OSError:
            group.remove()
            return None
        return group

    def join(self) -> None:
        """Move the calling process (and so everything it starts later) into the cgroup."""
        (self.path / "cgroup.procs").write_text(f"{os.getpid()}\n")

    def out_of_memory_kills(self) -> int:
        """How many processes the kernel killed for reaching ``memory.max``."""
        try:
            for line in (self.path / "memory.events").read_text().splitlines():
                key, _, value = line.partition(" ")
                if key == "oom_kill":
                    return int(value)
        except (OSError, ValueError):
            pass
        return 0

    def remove(self, timeout: float = 5.0) -> None:
        """Remove the cgroup once no process is left in it (the backend has ended them all by then)."""
        deadline = time.monotonic() + timeout
        while True:
            try:
                self.path.rmdir()
                return
            except FileNotFoundError:
                return
            except OSError:
                if time.monotonic() >= deadline:
                    return  # a later run cannot be hurt by an empty, forgotten cgroup
                time.sleep(0.05)
