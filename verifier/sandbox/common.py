"""What the local sandbox backends share: temp folders, tree copies, rlimits, the supervised run, collection.

The ``process`` and ``namespace`` backends differ only in what they wrap around the command; the loop that
reads capped output under a wall-clock deadline, the resource limits, the copy of the tree and the safe
collection of result files live here once. Everything here uses the standard library only, because the
namespace backend's init (``_nsinit``) imports it too.
"""

from __future__ import annotations

import contextlib
import ctypes
import os
import resource
import selectors
import shutil
import signal
import stat
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

from verifier.errors import UsageError
from verifier.models import Limits, SandboxRequest, SandboxResult

TEMP_PREFIX = "verifier-"
COLLECT_CAP_BYTES = 64 << 20  # one collected file; a larger one is left behind (absent), never truncated
STOP_GRACE_SECONDS = 5.0  # how long a politely stopped run may take before its whole group is killed
EXIT_GRACE_SECONDS = 0.5  # output still read after the command ended, from processes it left behind

PR_SET_PDEATHSIG = 1
_libc = ctypes.CDLL(None, use_errno=True)


def prctl(option: int, arg2: int = 0, arg3: int = 0, arg4: int = 0, arg5: int = 0) -> int:
    """prctl(2), raising OSError on failure."""
    args = [ctypes.c_ulong(value) for value in (arg2, arg3, arg4, arg5)]
    result = _libc.prctl(ctypes.c_int(option), *args)
    if result < 0:
        error = ctypes.get_errno()
        raise OSError(error, f"prctl({option}): {os.strerror(error)}")
    return int(result)


def die_with_parent(parent: int) -> None:
    """Make the kernel kill this process when ``parent`` ends (even by kill -9); end now if it already has.

    The kernel ties this to the parent *thread*: a backend run from a worker thread that ends early
    would take its sandbox down with it, which is the safe direction.
    """
    prctl(PR_SET_PDEATHSIG, signal.SIGKILL)
    if os.getppid() != parent:
        os.kill(os.getpid(), signal.SIGKILL)


# -- temp folders and the tree copy ------------------------------------------------------------------


def make_temp_dir(kind: str) -> Path:
    """A fresh private folder under the system temp folder, named ``verifier-<kind>-...``."""
    return Path(tempfile.mkdtemp(prefix=f"{TEMP_PREFIX}{kind}-", dir=tempfile.gettempdir()))


def remove_temp_dir(path: Path) -> None:
    """Remove ``path`` completely, making read-only folders writable where that is what stops it."""

    def make_writable_and_retry(function: Callable[[str], object], failed: str, _info: object) -> None:
        os.chmod(os.path.dirname(failed), 0o700)
        function(failed)

    if path.exists():
        shutil.rmtree(path, onerror=make_writable_and_retry)


def check_tree(request: SandboxRequest) -> None:
    """Refuse a request whose tree is not a folder, with a message instead of a traceback later."""
    if not os.path.isdir(request.tree):
        raise UsageError(f"the sandbox was given no tree to run in: {request.tree} is not a folder")


def copy_tree(source: str | Path, target: str | Path) -> None:
    """Copy folders, regular files (permission bits only) and symlinks (as links); skip anything else."""
    os.makedirs(target, exist_ok=True)
    with os.scandir(source) as entries:
        for entry in entries:
            destination = os.path.join(target, entry.name)
            if entry.is_symlink():
                os.symlink(os.readlink(entry.path), destination)
            elif entry.is_dir(follow_symlinks=False):
                copy_tree(entry.path, destination)
            elif entry.is_file(follow_symlinks=False):
                shutil.copyfile(entry.path, destination, follow_symlinks=False)
                os.chmod(destination, entry.stat(follow_symlinks=False).st_mode & 0o755)


def sandbox_env(env: Mapping[str, str], home: str, tmpdir: str) -> dict[str, str]:
    """The command's environment: exactly ``env`` plus HOME, TMPDIR and a PATH to the interpreter."""
    interpreter_bin = os.path.dirname(sys.executable)
    return {**env, "HOME": home, "TMPDIR": tmpdir, "PATH": f"{interpreter_bin}:/usr/bin:/bin"}


# -- resource limits ---------------------------------------------------------------------------------


def _lower_limit(kind: int, value: int) -> None:
    """Set soft and hard limit to ``value``, or to the current hard limit when that is lower."""
    _soft, hard = resource.getrlimit(kind)
    if hard != resource.RLIM_INFINITY:
        value = min(value, hard)
    resource.setrlimit(kind, (value, value))


def apply_limits(limits: Limits, processes: int | None) -> None:
    """Apply ``limits`` as rlimits to the calling process (run in the child, just before exec).

    ``processes`` is the RLIMIT_NPROC value, or None to leave it alone (it is ignored for host root).
    The CPU hard limit sits one second above the soft one: SIGXCPU first, SIGKILL if that is ignored.
    """
    _soft_cpu, hard_cpu = resource.getrlimit(resource.RLIMIT_CPU)
    wanted = limits.cpu_seconds if hard_cpu == resource.RLIM_INFINITY else min(limits.cpu_seconds, hard_cpu)
    resource.setrlimit(
        resource.RLIMIT_CPU, (wanted, wanted + 1 if hard_cpu == resource.RLIM_INFINITY else min(wanted + 1, hard_cpu))
    )
    _lower_limit(resource.RLIMIT_AS, limits.memory_mb << 20)
    _lower_limit(resource.RLIMIT_FSIZE, limits.file_size_mb << 20)
    _lower_limit(resource.RLIMIT_CORE, 0)
    if processes is not None:
        _lower_limit(resource.RLIMIT_NPROC, processes)


# -- the supervised run ------------------------------------------------------------------------------


class CappedOutput:
    """Keeps the first and the last half of ``cap`` bytes of a stream and counts the rest."""

    def __init__(self, cap: int) -> None:
        self.cap = max(cap, 2)
        self.head = bytearray()
        self.tail = bytearray()
        self.total = 0

    def add(self, chunk: bytes) -> None:
        self.total += len(chunk)
        room = self.cap // 2 - len(self.head)
        if room > 0:
            self.head += chunk[:room]
            chunk = chunk[room:]
        if chunk:
            self.tail += chunk
            excess = len(self.tail) - (self.cap - self.cap // 2)
            if excess > 0:
                del self.tail[:excess]

    @property
    def truncated(self) -> bool:
        return self.total > self.cap

    def text(self) -> str:
        if not self.truncated:
            return (self.head + self.tail).decode("utf-8", "replace")
        dropped = self.total - len(self.head) - len(self.tail)
        marker = f"\n[... {dropped} bytes of output dropped by the sandbox ...]\n"
        return self.head.decode("utf-8", "replace") + marker + self.tail.decode("utf-8", "replace")


@dataclass
class Outcome:
    """How a supervised process ended, as the backends' shared loop saw it."""

    exit_status: int | None = None
    signal: int | None = None
    timed_out: bool = False
    output_killed: bool = False  # stopped because it wrote far more than the cap
    output: str = ""
    output_truncated: bool = False
    wall_seconds: float = 0.0
    cpu_seconds: float = 0.0
    max_rss_kb: int = 0


def output_kill_threshold(cap: int) -> int:
    """Beyond the cap output is read and dropped; this far beyond it the run is stopped."""
    return max(16 * cap, 16 << 20)


def kill_group(process: subprocess.Popen[bytes]) -> None:
    """SIGKILL the process group (= session) the supervised process leads."""
    with contextlib.suppress(ProcessLookupError, PermissionError):
        os.killpg(process.pid, signal.SIGKILL)


def _live_group_members(group: int) -> list[int]:
    """Processes (not zombies) in process group ``group``, read from /proc/<pid>/stat."""
    members = []
    for name in os.listdir("/proc"):
        if not name.isdigit():
            continue
        try:
            with open(f"/proc/{name}/stat", "rb") as handle:
                fields = handle.read().rsplit(b")", 1)[1].split()
        except OSError:
            continue
        if int(fields[2]) == group and fields[0] != b"Z":
            members.append(int(name))
    return members


def end_group(group: int, timeout: float = STOP_GRACE_SECONDS) -> None:
    """Kill what is left of process group ``group`` and wait (bounded) until none of it runs any more."""
    deadline = time.monotonic() + timeout
    while _live_group_members(group) and time.monotonic() < deadline:
        try:
            os.killpg(group, signal.SIGKILL)
        except (ProcessLookupError, PermissionError):
            return
        time.sleep(0.01)


class _Supervision:
    """One run of one process: reads its output under the cap, enforces the wall time, reaps it."""

    def __init__(
        self,
        process: subprocess.Popen[bytes],
        limits: Limits,
        stop: Callable[[subprocess.Popen[bytes]], None],
        on_output: Callable[[bytes], None] | None = None,
    ) -> None:
        self.process = process
        self.on_output = on_output
        self.limits = limits
        self.stop = stop
        self.output = CappedOutput(limits.output_bytes)
        self.started = time.monotonic()
        self.wait_status: int | None = None
        self.usage: resource.struct_rusage | None = None
        self.outcome = Outcome()
        assert process.stdout is not None
        self.pipe = process.stdout.fileno()
        os.set_blocking(self.pipe, False)
        self.pipe_open = True
        self.selector = selectors.DefaultSelector()
        self.selector.register(self.pipe, selectors.EVENT_READ)

    def reap(self, block_for: float = 0.0) -> bool:
        """Reap the process if it ended (waiting up to ``block_for`` seconds); True once reaped."""
        deadline = time.monotonic() + block_for
        while self.wait_status is None:
            pid, status, usage = os.wait4(self.process.pid, os.WNOHANG)
            if pid:
                self.wait_status, self.usage = status, usage
                self.process.returncode = os.waitstatus_to_exitcode(status)
            elif time.monotonic() >= deadline:
                return False
            else:
                time.sleep(0.01)
        return True

    def read_some(self, timeout: float) -> None:
        for _key, _events in self.selector.select(timeout):
            try:
                chunk = os.read(self.pipe, 1 << 16)
            except BlockingIOError:
                continue
            if chunk:
                self.output.add(chunk)
                show_output(self.on_output, chunk)
            else:
                self.pipe_open = False
                self.selector.unregister(self.pipe)

    def watch(self) -> None:
        """Read output until the process ended and its output closed, or until a limit stops it."""
        deadline = self.started + self.limits.wall_seconds
        threshold = output_kill_threshold(self.limits.output_bytes)
        ended_at: float | None = None
        while True:
            if ended_at is None and self.reap():
                ended_at = time.monotonic()
            now = time.monotonic()
            if ended_at is not None and (not self.pipe_open or now - ended_at > EXIT_GRACE_SECONDS):
                return
            if ended_at is None and now >= deadline:
                self.outcome.timed_out = True
                return
            if self.pipe_open:
                self.read_some(min(0.1, max(deadline - now, 0.0)))
            else:
                time.sleep(0.01)
            if self.output.total > threshold and ended_at is None:
                self.outcome.output_killed = True
                return

    def finish(self) -> Outcome:
        """Stop whatever still runs, reap it, and fill in the outcome; safe to call after an interrupt."""
        if self.wait_status is None:
            self.stop(self.process)
            if not self.reap(STOP_GRACE_SECONDS):
                kill_group(self.process)
                self.reap(STOP_GRACE_SECONDS * 2)
        end_group(self.process.pid)
        if self.pipe_open:
            self.read_some(0)
        self.selector.close()
        assert self.process.stdout is not None
        self.process.stdout.close()
        return self.fill_outcome()

    def fill_outcome(self) -> Outcome:
        outcome = self.outcome
        outcome.wall_seconds = round(time.monotonic() - self.started, 3)
        outcome.output = self.output.text()
        outcome.output_truncated = self.output.truncated
        if self.wait_status is not None:
            code = os.waitstatus_to_exitcode(self.wait_status)
            outcome.exit_status, outcome.signal = (code, None) if code >= 0 else (None, -code)
        if self.usage is not None:
            outcome.cpu_seconds = round(self.usage.ru_utime + self.usage.ru_stime, 3)
            outcome.max_rss_kb = int(self.usage.ru_maxrss)
        return outcome


def show_output(on_output: Callable[[bytes], None] | None, chunk: bytes) -> None:
    """Hand ``chunk`` to the request's output watcher, if any; a failing watcher never stops the run."""
    if on_output is None:
        return
    try:
        on_output(chunk)
    except Exception:  # the watcher only displays; the run and its judgement go on without it
        return


def supervise(
    argv: Sequence[str],
    *,
    cwd: str,
    env: Mapping[str, str],
    limits: Limits,
    preexec: Callable[[], None],
    stop: Callable[[subprocess.Popen[bytes]], None] = kill_group,
    pass_fds: Sequence[int] = (),
    on_output: Callable[[bytes], None] | None = None,
) -> Outcome:
    """Run ``argv`` in its own session with stdin from /dev/null and stdout+stderr captured and capped.

    ``stop`` ends the run when a limit is hit (or on Ctrl-C); afterwards the whole process group is
    killed and waited for in any case, so nothing the run started outlives this call.
    """
    process = subprocess.Popen(
        list(argv),
        cwd=cwd,
        env=dict(env),
        stdin=subprocess.DEVNULL,
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        start_new_session=True,
        preexec_fn=preexec,
        close_fds=True,
        pass_fds=tuple(pass_fds),
    )
    supervision = _Supervision(process, limits, stop, on_output)
    try:
        supervision.watch()
    finally:
        outcome = supervision.finish()
    return outcome


# -- limits, collection and the result ---------------------------------------------------------------

_HINTS = (  # text a Python process prints when an rlimit stopped it (a hint, used only on failure)
    ("memory", "MemoryError"),
    ("processes", "BlockingIOError: [Errno 11] Resource temporarily unavailable"),
    ("file-size", "[Errno 27] File too large"),
)


def limit_hit(outcome: Outcome) -> str | None:
    """Which limit ended or marred the run, as far as can be told from outside."""
    if outcome.timed_out:
        return "wall"
    if outcome.output_killed:
        return "output"
    if outcome.signal == signal.SIGXCPU:
        return "cpu"
    if outcome.signal == signal.SIGXFSZ:
        return "file-size"
    if outcome.exit_status not in (None, 0):
        for name, text in _HINTS:
            if text in outcome.output:
                return name
    return "output" if outcome.output_truncated else None


def open_inside(root: int, relative: str) -> int | None:
    """Open the regular file ``relative`` below the folder fd ``root`` without following any symlink."""
    relative = os.path.normpath(relative)
    parts = relative.split("/")
    if relative.startswith("/") or any(part in ("", ".", "..") for part in parts):
        return None
    folder = root
    try:
        for part in parts[:-1]:
            opened = os.open(part, os.O_RDONLY | os.O_DIRECTORY | os.O_NOFOLLOW, dir_fd=folder)
            if folder != root:
                os.close(folder)
            folder = opened
        handle = os.open(parts[-1], os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK, dir_fd=folder)
    except OSError:
        return None
    finally:
        if folder != root:
            os.close(folder)
    if not stat.S_ISREG(os.fstat(handle).st_mode):
        os.close(handle)
        return None
    return handle


def read_capped(handle: int, cap: int = COLLECT_CAP_BYTES) -> bytes | None:
    """The file's bytes, or None when it holds more than ``cap`` bytes; closes ``handle``."""
    with os.fdopen(handle, "rb") as stream:
        data = stream.read(cap + 1)
    return None if len(data) > cap else data


def collect_files(
    root: str | Path, paths: Iterable[str], cap: int = COLLECT_CAP_BYTES
) -> tuple[dict[str, bytes], list[str]]:
    """Read the workspace-relative ``paths`` below ``root``; missing ones are absent.

    Returns the files and the paths left behind for being larger than ``cap``.
    """
    files: dict[str, bytes] = {}
    too_large: list[str] = []
    root_fd = os.open(root, os.O_RDONLY | os.O_DIRECTORY)
    try:
        for relative in dict.fromkeys(paths):
            handle = open_inside(root_fd, relative)
            if handle is None:
                continue
            data = read_capped(handle, cap)
            if data is None:
                too_large.append(relative)
            else:
                files[relative] = data
    finally:
        os.close(root_fd)
    return files, too_large


def too_large_note(paths: Iterable[str]) -> str:
    """A line for the output naming collected files that were left behind."""
    names = ", ".join(paths)
    return f"\n[verifier sandbox: left behind, larger than {COLLECT_CAP_BYTES >> 20} MB: {names}]\n" if names else ""


def sandbox_result(backend: str, isolation: str, outcome: Outcome, files: Mapping[str, bytes]) -> SandboxResult:
    """The backend-neutral result of a supervised run."""
    return SandboxResult(
        backend=backend,
        isolation=isolation,
        exit_status=outcome.exit_status,
        signal=outcome.signal,
        timed_out=outcome.timed_out,
        output=outcome.output,
        output_truncated=outcome.output_truncated,
        files=dict(files),
        wall_seconds=outcome.wall_seconds,
        cpu_seconds=outcome.cpu_seconds,
        max_rss_kb=outcome.max_rss_kb,
        limit_hit=limit_hit(outcome),
    )
