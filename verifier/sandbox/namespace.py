"""The ``namespace`` sandbox: Linux user, PID, network, mount, IPC, UTS and cgroup namespaces, no daemon.

The command runs in a minimal read-only root built on tmpfs (the host's /usr and /lib, the interpreter's
own folders, a few synthesised /etc files, four devices), with a fresh /proc, no network, no capabilities,
an unprivileged id, and two writable size-limited tmpfs folders: the workspace (a copy of the tree) and
/tmp. The trusted init that builds all this is :mod:`verifier.sandbox._nsinit`; this module starts it
under the shared supervision loop and reads back what it reports.
"""

from __future__ import annotations

import contextlib
import dataclasses
import errno
import functools
import hashlib
import json
import os
import signal
import site
import subprocess
import sys
from pathlib import Path
from typing import Any

from verifier.errors import CannotVerify
from verifier.models import Limits, SandboxRequest, SandboxResult
from verifier.sandbox import _nsinit, common
from verifier.sandbox.cgroup import RunGroup, whole_run_problem

_BOOT = "import sys; sys.path.insert(0, sys.argv[1]); from verifier.sandbox._nsinit import main; main(sys.argv[2])"
_HOST_FOLDERS = ("/usr", "/bin", "/sbin", "/lib", "/lib32", "/lib64", "/libx32")
_HINT = (
    "the namespace sandbox needs unprivileged user namespaces (sysctl user.max_user_namespaces > 0; "
    "on some systems kernel.unprivileged_userns_clone=1 or an AppArmor profile allowing them); "
    "otherwise use --sandbox docker"
)


def interpreter_paths() -> list[str]:
    """The folders the sandboxed interpreter needs, besides what the new root shows of the host anyway."""
    candidates = {
        sys.prefix,
        sys.base_prefix,
        sys.exec_prefix,
        sys.base_exec_prefix,
        os.path.dirname(os.path.realpath(sys.executable)),
        *site.getsitepackages(),
    }
    real = sorted({os.path.realpath(path) for path in candidates if os.path.isdir(path)})
    needed: list[str] = []
    for path in real:
        covered = any(path == folder or path.startswith(folder + "/") for folder in (*_HOST_FOLDERS, *needed))
        if not covered and path != "/":
            needed.append(path)
    return needed


def _ask_init_to_stop(process: subprocess.Popen[bytes]) -> None:
    """SIGTERM the outer init: it SIGKILLs PID 1 of the sandbox, so the kernel ends all inside it."""
    with contextlib.suppress(ProcessLookupError):
        os.kill(process.pid, signal.SIGTERM)


def _start_init(parent: int, group: RunGroup | None) -> None:
    """Between fork and exec of the init: die with the verifier, whatever kills it; join the run's cgroup."""
    common.die_with_parent(parent)
    if group is not None:
        group.join()


class NamespaceBackend:
    """Isolation by Linux namespaces, built with unshare(2), pivot_root(2) and rlimits; needs no daemon."""

    name = "namespace"
    isolation = (
        "Linux namespaces: own user (unprivileged id, no capabilities), PID, network (none), mount "
        "(minimal read-only root, writable workspace and /tmp only), IPC, UTS and cgroup; shares "
        "the host kernel"
    )

    def problem(self) -> str | None:
        return _probe()

    def for_repository(self, repo: str, base: str | None) -> NamespaceBackend:
        return self

    def environment(self) -> str:
        return ""

    def facts(self) -> list[tuple[str, str]]:
        import platform

        limit = Path("/proc/sys/user/max_user_namespaces")
        whole_run = whole_run_problem()
        machine = platform.machine()
        return [
            ("kernel", platform.release()),
            ("user namespaces allowed", limit.read_text().strip() if limit.exists() else "unknown"),
            (
                "memory of the whole run",
                "limited by a cgroup v2 of its own"
                if whole_run is None
                else f"not limited as a whole ({whole_run}); each process has its own limit (rlimit)",
            ),
            (
                "system-call filter",
                "seccomp: no new user namespaces, no keys, BPF, perf, userfaultfd, io_uring or modules"
                if _nsinit.seccomp_program(machine) is not None
                else f"none: no table of system calls for {machine}",
            ),
        ]

    def run(self, request: SandboxRequest) -> SandboxResult:
        common.check_tree(request)
        folder = common.make_temp_dir("namespace")
        group = RunGroup.create(request.limits.memory_mb << 20)
        try:
            result = self._run_in(folder, request, group)
            if group is not None and group.out_of_memory_kills() and result.limit_hit in (None, "memory"):
                result = dataclasses.replace(result, limit_hit="memory")
            return result
        finally:
            if group is not None:
                group.remove()
            common.remove_temp_dir(folder)

    def _run_in(self, folder: Path, request: SandboxRequest, group: RunGroup | None) -> SandboxResult:
        out_dir, new_root = folder / "out", folder / "root"
        out_dir.mkdir(mode=0o700)
        new_root.mkdir(mode=0o700)
        config = {
            "tree": os.path.realpath(request.tree),
            "out_dir": str(out_dir),
            "new_root": str(new_root),
            "python": sys.executable,
            "args": list(request.python_args),
            "collect": list(request.collect),
            "env": common.sandbox_env(request.env, _nsinit.HOME, "/tmp"),
            "limits": dataclasses.asdict(request.limits),
            "interpreter_paths": interpreter_paths(),
        }
        config_file = folder / "config.json"
        config_file.touch(mode=0o600)
        config_file.write_text(json.dumps(config))
        package_parent = str(Path(__file__).resolve().parents[2])
        outcome = common.supervise(
            [sys.executable, "-I", "-S", "-c", _BOOT, package_parent, str(config_file)],
            cwd=str(folder),
            env={"PATH": "/usr/bin:/bin", "LANG": "C.UTF-8"},
            limits=request.limits,
            preexec=functools.partial(_start_init, os.getpid(), group),
            stop=_ask_init_to_stop,
            on_output=request.on_output,
        )
        status = _read_status(out_dir)
        if "error" in status:
            raise CannotVerify(
                f"the namespace sandbox could not be set up ({status.get('stage')}): {status['error']}",
                hint=_setup_hint(status),
            )
        if "exit_status" not in status and not (outcome.timed_out or outcome.output_killed):
            tail = outcome.output[-2000:].strip() or "no output"
            raise CannotVerify(f"the namespace sandbox's init ended without a report: {tail}", hint=_HINT)
        return common.sandbox_result(self.name, self.isolation, _merge(outcome, status), _collected(out_dir, status))


def _setup_hint(status: dict[str, Any]) -> str:
    """What to do about a failed setup: the workspace's size only when that is what ran out."""
    if status.get("errno") in (errno.ENOSPC, errno.EDQUOT):
        return "raise the policy's workspace limit, or make the tree smaller"
    if status.get("stage") == "unshare":
        return _HINT
    return "'verifier sandbox doctor' shows what works on this machine; otherwise use --sandbox docker"


def _read_status(out_dir: Path) -> dict[str, Any]:
    data = common.collect_files(out_dir, [_nsinit.STATUS_FILE], 1 << 20)[0].get(_nsinit.STATUS_FILE)
    try:
        return json.loads(data) if data else {}
    except ValueError:
        return {"error": "its status report is unreadable", "stage": "report"}


def _collected(out_dir: Path, status: dict[str, Any]) -> dict[str, bytes]:
    names: dict[str, str] = status.get("files", {})
    files: dict[str, bytes] = {}
    stored, _too_large = common.collect_files(out_dir, names.values())
    for relative, name in names.items():
        if name in stored:
            files[relative] = stored[name]
    return files


def _merge(outcome: common.Outcome, status: dict[str, Any]) -> common.Outcome:
    """The command's own exit and usage (from the init) replace the init's, when the init reported."""
    if "exit_status" not in status:  # stopped by a limit before the command ended: it was killed
        return dataclasses.replace(outcome, exit_status=None, signal=int(signal.SIGKILL))
    return dataclasses.replace(
        outcome,
        exit_status=status["exit_status"],
        signal=status["signal"],
        cpu_seconds=status["cpu_seconds"],
        max_rss_kb=status["max_rss_kb"],
        output=outcome.output + common.too_large_note(status.get("too_large", ())),
    )


@functools.lru_cache(maxsize=1)
def _probe() -> str | None:
    """None when the namespace sandbox works here, else why not. A success is remembered in the user's
    cache for this boot, interpreter, user and sandbox code (a probe costs a real sandbox start); a failure
    is probed again every time. A stale success only costs a SandboxUnavailable at the real run."""
    marker = _probe_marker()
    if marker is not None and marker.is_file():
        return None
    problem = _probe_now()
    if problem is None and marker is not None:
        with contextlib.suppress(OSError):
            marker.parent.mkdir(parents=True, exist_ok=True)
            marker.write_text("the namespace sandbox worked\n")
    return problem


def _probe_marker() -> Path | None:
    try:
        boot = Path("/proc/sys/kernel/random/boot_id").read_text().strip()
        code = (Path(__file__).parent / "_nsinit.py").stat().st_mtime_ns
    except OSError:
        return None
    key = hashlib.sha256(f"{boot}|{sys.executable}|{os.getuid()}|{code}".encode()).hexdigest()[:24]
    cache = Path(os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache")
    return cache / "verifier" / f"namespace-ok-{key}"


def _probe_now() -> str | None:
    """Run one tiny command in a real namespace sandbox; None when that worked, else why not."""
    if not sys.platform.startswith("linux"):
        return f"needs Linux (this is {sys.platform}); use --sandbox docker"
    import platform

    if platform.machine() not in _nsinit.SYS_PIVOT_ROOT:
        return f"does not know pivot_root(2) on {platform.machine()}; use --sandbox docker"
    tree = common.make_temp_dir("probe")
    try:
        request = SandboxRequest(
            tree=str(tree),
            python_args=("-c", "print('sandbox-ok')"),
            env={},
            limits=Limits(wall_seconds=60),
            collect=(),
        )
        result = NamespaceBackend().run(request)
    except CannotVerify as error:
        return str(error).replace("\n  hint: ", "; ")
    except OSError as error:
        return f"cannot start the sandbox's init: {error}; {_HINT}"
    finally:
        common.remove_temp_dir(tree)
    if result.exit_status != 0 or "sandbox-ok" not in result.output:
        return f"a test command failed in the sandbox: {result.output[-500:].strip() or 'no output'}; {_HINT}"
    return None
