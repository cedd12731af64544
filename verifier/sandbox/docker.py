"""The docker backend: each run in a fresh, locked-down container of the sandbox image.

The tree is copied in as a tar archive (never bind-mounted) into a size-limited tmpfs volume at
``/workspace``; the command runs there as a non-root user with no network, a read-only root
filesystem, no capabilities, no new privileges and cgroup limits on processes, memory (no swap) and
CPU. The wall-clock limit is enforced from outside (the container is killed) and output is capped.

How a run works, and why: an engine's archive API only sees a volume while the daemon has it
mounted, so the container starts with a tiny *holder* as PID 1, the tree is copied in, the command
runs by ``exec`` and the collected files are copied out before the container is removed. The holder
runs as its own user (:data:`KEEPER_UID`), so the tests' user can neither trace nor signal it; it
reaps orphans, and ends the container (so every test process in it) once the wall limit plus a grace
has passed or as soon as the verifier's attached stream to its stdin closes: a ``kill -9`` of the
verifier stops the tests within about a second, and the engine removes the stopped container. Every
container also carries labels naming its owner process, so a later run reaps whatever is left.

Copy-out trusts nothing: each result path is looked at in the engine's stat header and in the tar
member's header before any content is read; only a regular file of at most
:data:`~verifier.sandbox.common.COLLECT_CAP_BYTES` comes back, read within the run's wall clock plus a
short grace, with the container paused so that nothing of the tests changes it meanwhile.

The Docker SDK is imported here only, when a docker run or check is actually asked for.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import socket
import tarfile
import tempfile
import threading
import time
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath
from typing import TYPE_CHECKING, Any

from verifier.errors import CannotVerify, SandboxUnavailable, VerifierError
from verifier.models import Limits, SandboxRequest, SandboxResult
from verifier.sandbox.common import COLLECT_CAP_BYTES, show_output
from verifier.sandbox.engine import (  # re-exported: the names the backend's users know it by
    DEFAULT_IMAGE,
    IMAGE_ENV,
    LABEL,
    NAME,
    SANDBOX_UID,
    WORKSPACE,
    _first_line,
    connect,
)

if TYPE_CHECKING:  # the Docker SDK ships no type information (the ignore is unused where stubs exist)
    from docker import DockerClient  # type: ignore[import-untyped,unused-ignore]

KEEPER_UID = 10002  # the holder's user: not the tests', so they cannot trace or signal it
OWNER_LABEL = "verifier.owner"  # host/pid/start-ticks of the verifier process that started it
EXPIRES_LABEL = "verifier.expires"  # host epoch after which the container is certainly orphaned
ORPHAN_GRACE_SECONDS = 60
COPY_OUT_GRACE_SECONDS = 10.0  # copy-out may run this long past the wall limit, never longer
HEADER_ALLOWANCE = 1 << 20  # tar headers (PAX ones included) read besides a collected file's content
# Go's os.FileMode type bits, as the engine's stat header reports them (dir, symlink, device, pipe, socket,
# char device, irregular): a regular file has none of them.
_FILE_TYPE_BITS = (1 << 31) | (1 << 27) | (1 << 26) | (1 << 25) | (1 << 24) | (1 << 21) | (1 << 19)
MAX_CPUS = 2.0
SPOOL_BYTES = 32 * 1024 * 1024

# PID 1 of every sandbox container: reap orphaned children; end the container after argv[1] seconds,
# or at once when stdin (the verifier's attached stream) closes.
HOLDER = """\
import os, select, sys, time
end = time.monotonic() + float(sys.argv[1])
while time.monotonic() < end:
    try:
        while os.waitpid(-1, os.WNOHANG)[0]:
            pass
    except ChildProcessError:
        pass
    if select.select([0], [], [], 0.5)[0] and not os.read(0, 4096):
        break
"""


# -- reaping what killed runs left ------------------------------------------------------------------
def _start_ticks(pid: int) -> str | None:
    """The process's start time in clock ticks (field 22 of /proc/pid/stat), None when it is gone."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    return stat.rsplit(")", 1)[1].split()[19]


def _alive(pid: int, ticks: str) -> bool:
    if Path("/proc/self/stat").exists():
        return _start_ticks(pid) == ticks  # a reused pid has another start time
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def owner_label() -> str:
    return f"{socket.gethostname()}/{os.getpid()}/{_start_ticks(os.getpid()) or '0'}"


def is_orphan(labels: Mapping[str, str], now: float) -> bool:
    """A container is orphaned when its owner process on this host is dead, or it outlived its expiry."""
    try:
        if float(labels.get(EXPIRES_LABEL, "inf")) < now:
            return True
        host, pid, ticks = labels.get(OWNER_LABEL, "").split("/")
        return host == socket.gethostname() and not _alive(int(pid), ticks)
    except ValueError:
        return False  # not a label this module wrote: leave it alone


def reap_orphans(client: DockerClient) -> int:
    """Remove sandbox containers (and their volumes) whose owner died; return how many went."""
    import docker

    removed = 0
    now = time.time()
    for container in client.containers.list(all=True, filters={"label": f"{LABEL}=1"}):
        if is_orphan(container.labels, now):
            try:
                container.remove(force=True, v=True)
                removed += 1
            except docker.errors.NotFound:
                pass  # another run reaped it first
            except docker.errors.APIError as error:
                if error.status_code != 409:  # 409: removal already in progress elsewhere
                    raise
    return removed


# -- moving files in and out ------------------------------------------------------------------------
def _owned_by_sandbox(info: tarfile.TarInfo) -> tarfile.TarInfo | None:
    """Give every entry to the sandbox user; drop devices and FIFOs; strip set-id bits."""
    if not (info.isfile() or info.isdir() or info.issym() or info.islnk()):
        return None
    info.uid = info.gid = SANDBOX_UID
    info.uname = info.gname = ""
    info.mode &= 0o777
    return info


def tree_archive(tree: str) -> tempfile.SpooledTemporaryFile[bytes]:
    """A tar of the tree's contents (not the folder itself), spooled to disk when large."""
    spool: tempfile.SpooledTemporaryFile[bytes] = tempfile.SpooledTemporaryFile(max_size=SPOOL_BYTES)  # noqa: SIM115
    with tarfile.open(fileobj=spool, mode="w", format=tarfile.PAX_FORMAT) as archive:
        for entry in sorted(os.listdir(tree)):
            archive.add(os.path.join(tree, entry), arcname=entry, filter=_owned_by_sandbox)
    spool.seek(0)
    return spool


def collect_path(relative: str) -> str:
    """The in-container path of a workspace-relative file, refusing absolute or escaping paths."""
    path = PurePosixPath(relative)
    if path.is_absolute() or ".." in path.parts or not path.parts:
        raise CannotVerify(f"cannot collect '{relative}': not a path inside the workspace")
    return f"{WORKSPACE}/{path}"


class CopyOutRefused(Exception):
    """A result path that is not brought back, and why (said in the run's output)."""


def refuse_by_stat(stat: Mapping[str, Any], cap: int) -> None:
    """Refuse from the engine's stat header alone, before a byte of the archive is read."""
    mode = int(stat.get("mode", 0))
    if mode & _FILE_TYPE_BITS or stat.get("linkTarget"):
        raise CopyOutRefused("not a regular file")
    if int(stat.get("size", 0)) > cap:
        raise CopyOutRefused(f"larger than {cap >> 20} MB")


class _BoundedStream(io.RawIOBase):
    """The archive's chunks as a file, refusing to deliver more than ``limit`` bytes or past ``deadline``."""

    def __init__(self, chunks: Iterator[bytes], limit: int, deadline: float) -> None:
        self.chunks = chunks
        self.limit = limit
        self.deadline = deadline
        self.pending = b""
        self.total = 0

    def readable(self) -> bool:
        return True

    def readinto(self, buffer: Any) -> int:
        while not self.pending:
            if time.monotonic() > self.deadline:
                raise CopyOutRefused("not read within the run's time")
            chunk = next(self.chunks, None)
            if chunk is None:
                return 0
            self.total += len(chunk)
            if self.total > self.limit:
                raise CopyOutRefused("its archive is larger than any result file may be")
            self.pending = chunk
        size = min(len(buffer), len(self.pending))
        buffer[:size] = self.pending[:size]
        self.pending = self.pending[size:]
        return size


def single_file(chunks: Iterator[bytes], cap: int, deadline: float) -> bytes:
    """The content of the one regular file an archive of a result path holds; CopyOutRefused otherwise.

    The member's type and size come from its tar header and are checked before its content is read.
    """
    stream = _BoundedStream(chunks, cap + HEADER_ALLOWANCE, deadline)
    try:
        with tarfile.open(fileobj=stream, mode="r|") as archive:
            member = archive.next()
            if member is None or not member.isreg():
                raise CopyOutRefused("not a regular file (by its archive)")
            if member.size > cap:
                raise CopyOutRefused(f"its archive holds more than {cap >> 20} MB")
            extracted = archive.extractfile(member)
            if extracted is None:
                raise CopyOutRefused("not a regular file (by its archive)")
            return extracted.read(member.size)
    except tarfile.TarError as error:
        raise CopyOutRefused(f"its archive is unreadable ({error})") from error


_REFUSED_BY_STAT = ("not a regular file", "larger than")


def _stat_passed(why: str) -> bool:
    """Whether a refusal came after the stat header had passed (from the archive itself)."""
    return not why.startswith(_REFUSED_BY_STAT) or why == "not a regular file (by its archive)"


def left_behind_note(refused: Mapping[str, str]) -> str:
    """A line for the output naming the result paths that were not brought back, and why."""
    if not refused:
        return ""
    named = "; ".join(f"{path}: {why}" for path, why in refused.items())
    return f"\n[verifier sandbox: left behind: {named}]\n"


# -- one run ----------------------------------------------------------------------------------------
@dataclass
class _Outcome:
    """What the command did, as seen from outside the container."""

    output: bytearray = field(default_factory=bytearray)
    truncated: bool = False
    killed_for: str | None = None  # "wall" or "output" when we killed the container
    exit_code: int | None = None


def _labels(limits: Limits) -> dict[str, str]:
    expires = time.time() + limits.wall_seconds + ORPHAN_GRACE_SECONDS
    return {LABEL: "1", OWNER_LABEL: owner_label(), EXPIRES_LABEL: f"{expires:.0f}"}


def _host_settings(client: DockerClient, limits: Limits) -> dict[str, Any]:
    """The lock-down: everything a container is denied, in the SDK's create() keywords."""
    from docker.types import DriverConfig, Mount, Ulimit  # type: ignore[import-untyped,unused-ignore]

    workspace_options = f"size={limits.workspace_mb}m,uid={SANDBOX_UID},gid={SANDBOX_UID},mode=0700,nosuid,nodev"
    workspace = Mount(
        WORKSPACE,
        None,  # anonymous: removed with the container
        type="volume",
        driver_config=DriverConfig("local", {"type": "tmpfs", "device": "tmpfs", "o": workspace_options}),
    )
    cpus = min(MAX_CPUS, float(client.info().get("NCPU") or 1))
    file_bytes = limits.file_size_mb * 1024 * 1024
    return {
        "network_mode": "none",
        "read_only": True,
        "mounts": [workspace],
        "tmpfs": {"/tmp": f"size={limits.tmp_mb}m,mode=1777,exec,nosuid,nodev"},
        "cap_drop": ["ALL"],
        "security_opt": ["no-new-privileges:true"],
        "user": f"{KEEPER_UID}:{KEEPER_UID}",  # the holder's; the command runs as SANDBOX_UID by exec
        "pids_limit": limits.processes,
        "mem_limit": f"{limits.memory_mb}m",
        "memswap_limit": f"{limits.memory_mb}m",  # equal to the memory limit: no swap
        "nano_cpus": int(cpus * 1e9),
        "ipc_mode": "private",
        "shm_size": f"{min(64, limits.tmp_mb)}m",
        "ulimits": [
            Ulimit(name="cpu", soft=limits.cpu_seconds, hard=limits.cpu_seconds + 5),
            Ulimit(name="fsize", soft=file_bytes, hard=file_bytes),
        ],
    }


def _command_env(env: Mapping[str, str]) -> dict[str, str]:
    # The host's PATH means nothing inside; the image's PATH finds its ``python``.
    inside = {key: value for key, value in env.items() if key != "PATH"}
    inside.update(HOME="/tmp", TMPDIR="/tmp")
    return inside


def _untimed(raw: Any) -> None:
    """Let a blocking read of the exec stream wait as long as the command runs (the watchdog ends it)."""
    for candidate in _stream_layers(raw):
        if hasattr(candidate, "settimeout"):
            candidate.settimeout(None)


def _stream_layers(raw: Any) -> list[Any]:
    """The exec stream and the socket beneath it (the SDK wraps it differently per transport)."""
    inner = getattr(raw, "_sock", None)
    return [raw] if inner is None else [raw, inner]


class _Run:
    """One container: created, started, used and always removed (``with`` guarantees the last)."""

    def __init__(self, client: DockerClient, image: str, limits: Limits) -> None:
        self.client = client
        self.image = image
        self.limits = limits
        self._container: Any = None
        self._lifeline: Any = None  # the attached stdin of the holder: closing it ends the container
        self._killed = threading.Event()
        self.started = time.monotonic()
        self.running = False  # True once the tests' code may have run: later engine errors may be theirs

    @property
    def container(self) -> Any:
        if self._container is None:
            raise RuntimeError("the sandbox container is not there (created and removed by _Run only)")
        return self._container

    def __enter__(self) -> _Run:
        settings = _host_settings(self.client, self.limits)
        lifetime = self.limits.wall_seconds + ORPHAN_GRACE_SECONDS
        self._container = self.client.containers.create(
            self.image,
            ["python", "-I", "-c", HOLDER, str(lifetime)],
            detach=False,  # with stdin_open: the engine closes the holder's stdin when our stream closes
            stdin_open=True,
            auto_remove=True,
            labels=_labels(self.limits),
            working_dir=WORKSPACE,
            **settings,
        )
        self._lifeline = self.client.api.attach_socket(self._container.id, params={"stdin": 1, "stream": 1})
        self._container.start()
        return self

    def __exit__(self, *_: object) -> None:
        self.remove()

    def remove(self) -> None:
        import docker

        if self._lifeline is not None:
            _close(self._lifeline)
            self._lifeline = None
        if self._container is None:
            return
        container, self._container = self._container, None
        try:
            container.remove(force=True, v=True)
        except docker.errors.NotFound:
            return
        except docker.errors.APIError as error:
            if error.status_code != 409:  # 409: the engine is removing it already (auto_remove)
                raise
        _wait_until_gone(container)

    def kill(self, reason: str, outcome: _Outcome) -> None:
        import docker

        if self._killed.is_set():
            return
        self._killed.set()
        outcome.killed_for = outcome.killed_for or reason
        with contextlib.suppress(docker.errors.APIError):  # already stopped
            self.container.kill()

    def copy_in(self, tree: str) -> None:
        import docker

        with tree_archive(tree) as archive:
            size_mb = archive.seek(0, io.SEEK_END) / (1024 * 1024)
            archive.seek(0)
            try:
                self.container.put_archive(WORKSPACE, archive)
            except docker.errors.APIError as error:
                raise _copy_in_failure(error, size_mb, self.limits.workspace_mb) from error

    def execute(
        self, python_args: tuple[str, ...], env: Mapping[str, str], on_output: Callable[[bytes], None] | None = None
    ) -> _Outcome:
        """Run ``python *python_args`` in the workspace; kill at the wall limit or the output cap."""
        outcome = _Outcome()
        api = self.client.api
        self.running = True
        exec_id = api.exec_create(
            self.container.id,
            ["python", *python_args],
            workdir=WORKSPACE,
            user=f"{SANDBOX_UID}:{SANDBOX_UID}",
            environment=_command_env(env),
        )["Id"]
        watchdog = threading.Timer(self.limits.wall_seconds, self.kill, args=("wall", outcome))
        watchdog.daemon = True
        raw = api.exec_start(exec_id, socket=True)
        watchdog.start()
        try:
            self._read_output(raw, outcome, on_output)
        finally:
            watchdog.cancel()
            _close(raw)  # first: an unread stream would hold the engine up while it kills
        if outcome.truncated:
            self.kill("output", outcome)
        if not self._killed.is_set():
            outcome.exit_code = api.exec_inspect(exec_id).get("ExitCode")
        return outcome

    def _read_output(self, raw: Any, outcome: _Outcome, on_output: Callable[[bytes], None] | None) -> None:
        from docker.utils.socket import frames_iter  # type: ignore[import-untyped,unused-ignore]

        _untimed(raw)
        cap = self.limits.output_bytes
        try:
            for _stream, data in frames_iter(raw, tty=False):
                room = cap - len(outcome.output)
                outcome.output += data[: max(room, 0)]
                show_output(on_output, data)
                if len(data) > room:
                    outcome.truncated = True  # execute() kills the container once the stream is closed
                    return
        except OSError:
            if not self._killed.is_set():
                raise  # the stream broke without our kill: the engine went away

    def copy_out(self, paths: tuple[str, ...]) -> tuple[dict[str, bytes], dict[str, str]]:
        """The collected files that are regular and small enough, and the paths refused (with why).

        Each path's stat header is fetched alone first (a HEAD request: no content); only a path that
        passes is fetched. An archive left unread would hold the engine's archive lock on the container.
        """
        import docker

        files: dict[str, bytes] = {}
        refused: dict[str, str] = {}
        deadline = max(self.started + self.limits.wall_seconds, time.monotonic()) + COPY_OUT_GRACE_SECONDS
        with contextlib.suppress(docker.errors.APIError):  # frozen: nothing of the tests changes the files now
            self.container.pause()
        wanted = list(dict.fromkeys(paths))
        for number, relative in enumerate(wanted):
            try:
                stat = self._stat(collect_path(relative))
                if stat is None:
                    continue  # the command did not write it; the caller decides what that means
                refuse_by_stat(stat, COLLECT_CAP_BYTES)
                chunks, _stat = self.container.get_archive(collect_path(relative))
                files[relative] = single_file(chunks, COLLECT_CAP_BYTES, deadline)
            except CopyOutRefused as why:
                refused[relative] = str(why)
                if _stat_passed(refused[relative]):  # the archive was left half read: the engine holds it
                    refused.update({rest: "not read after an earlier refusal" for rest in wanted[number + 1 :]})
                    break
        return files, refused

    def _stat(self, path: str) -> dict[str, Any] | None:
        """The engine's stat header of ``path`` in the container (None: no such path), without its content."""
        import base64

        api = self.client.api
        response = api.head(api._url("/containers/{0}/archive", self.container.id), params={"path": path})
        if response.status_code == 404:
            return None
        api._raise_for_status(response)
        header = response.headers.get("X-Docker-Container-Path-Stat", "")
        try:
            stat = json.loads(base64.b64decode(header))
        except ValueError as error:
            raise CopyOutRefused("the engine's stat header is unreadable") from error
        if not isinstance(stat, dict):
            raise CopyOutRefused("the engine's stat header is unreadable")
        return stat

    def usage(self) -> tuple[float, int, int, int]:
        """CPU seconds, peak memory (KB), the memory limit (KB) and the peak's failure count, if known."""
        try:
            stats = self.client.api.stats(self.container.id, stream=False, one_shot=True)
        except Exception:  # stats are a courtesy: never let them fail a run
            return 0.0, 0, 0, 0
        cpu = stats.get("cpu_stats", {}).get("cpu_usage", {}).get("total_usage", 0) / 1e9
        memory = stats.get("memory_stats", {})
        peak = int(memory.get("max_usage", 0)) // 1024
        return cpu, peak, int(memory.get("limit", 0)) // 1024, int(memory.get("failcnt", 0))


def _wait_until_gone(container: Any, timeout: float = 30.0) -> None:
    """Wait (bounded) until the engine has finished removing ``container``."""
    import docker

    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            container.reload()
        except docker.errors.NotFound:
            return
        time.sleep(0.1)


def _copy_in_failure(error: BaseException, size_mb: float, limit_mb: int) -> CannotVerify:
    """Say what stopped the copy of the tree: the workspace's size only when that is what the engine said."""
    text = _first_line(error)
    if "no space left" in text.lower() or "file too large" in text.lower():
        return CannotVerify(
            f"the tree ({size_mb:.1f} MB as an archive) does not fit the sandbox workspace "
            f"(limit {limit_mb} MB): {text}",
            hint="raise the policy's workspace limit, or make the tree smaller",
        )
    return CannotVerify(
        f"the engine refused to copy the tree into the sandbox: {text}",
        hint="the engine's own log says more; 'verifier sandbox doctor' shows the engine in use",
    )


def _close(raw: Any) -> None:
    """End the exec stream's connection for real (closing a socket file object alone may keep it open)."""
    for candidate in reversed(_stream_layers(raw)):
        if hasattr(candidate, "shutdown"):
            with contextlib.suppress(OSError):
                candidate.shutdown(socket.SHUT_RDWR)
    with contextlib.suppress(OSError):
        raw.close()


# -- reading what happened --------------------------------------------------------------------------
SIGNAL_LIMITS = {9: None, 24: "cpu", 25: "file-size"}  # SIGKILL, SIGXCPU, SIGXFSZ on Linux (signal(7))


def _exit_and_signal(code: int | None) -> tuple[int | None, int | None]:
    """Docker reports a process killed by signal N as exit code 128 + N."""
    if code is not None and 128 < code <= 128 + 64:
        return None, code - 128
    return code, None


def _limit_hit(outcome: _Outcome, signal: int | None, peak_kb: int, limit_kb: int) -> str | None:
    if outcome.killed_for:
        return outcome.killed_for
    if signal == 9 and limit_kb and peak_kb >= limit_kb * 0.95:
        return "memory"
    return SIGNAL_LIMITS.get(signal) if signal else None


class DockerBackend:
    """Runs the request in a fresh, locked-down container of the sandbox image."""

    name = NAME
    isolation = (
        "container: own filesystem and PID space, no network, no capabilities, non-root, read-only root, "
        "cgroup limits; shares the host kernel"
    )

    def __init__(self, image: str | None = None) -> None:
        self.image = image or os.environ.get(IMAGE_ENV) or DEFAULT_IMAGE

    def for_repository(self, repo: str, base: str | None) -> DockerBackend:
        """The image built for the repository's test dependencies at ``base``, when there is one
        (and no image was chosen through the environment)."""
        if os.environ.get(IMAGE_ENV):
            return self
        from verifier.sandbox.images import image_for

        return DockerBackend(image_for(repo, base) or self.image)

    def environment(self) -> str:
        return self.image

    def facts(self) -> list[tuple[str, str]]:
        try:
            from verifier.sandbox.images import docker_facts

            return docker_facts(self.image)
        except Exception as error:  # the doctor reports; it never fails on a missing piece
            return [("facts", f"unavailable: {_first_line(error)}")]

    def problem(self) -> str | None:
        try:
            client = connect()
        except SandboxUnavailable as error:
            return "; ".join(reason for _, reason in error.tried) + (f" ({error.hint})" if error.hint else "")
        try:
            return self._image_problem(client)
        finally:
            client.close()

    def _image_problem(self, client: DockerClient) -> str | None:
        import docker

        try:
            client.images.get(self.image)
        except docker.errors.ImageNotFound:
            return (
                f"the sandbox image {self.image} is not on the engine; build it with 'verifier sandbox build' "
                f"(offline: sandbox_images/build-offline) or set {IMAGE_ENV}"
            )
        except docker.errors.APIError as error:
            return f"the engine refused to look up image {self.image}: {_first_line(error)}"
        return None

    def run(self, request: SandboxRequest) -> SandboxResult:
        import docker
        import requests

        client = connect()
        box = _Run(client, self.image, request.limits)
        try:
            reap_orphans(client)
            problem = self._image_problem(client)
            if problem:
                raise SandboxUnavailable([(NAME, problem)])
            return self._run_in_container(box, request)
        except (docker.errors.DockerException, requests.exceptions.RequestException) as error:
            raise _engine_failure(error, box.running) from error
        finally:
            client.close()

    def _run_in_container(self, box: _Run, request: SandboxRequest) -> SandboxResult:
        started = time.monotonic()
        refused: dict[str, str] = {}
        with box:
            box.copy_in(request.tree)
            outcome = box.execute(request.python_args, request.env, request.on_output)
            exit_status, signal = _exit_and_signal(outcome.exit_code)
            # The engine's stats cost about half a second, so they are read only to explain a kill.
            cpu, peak_kb, limit_kb, _failures = box.usage() if signal else (0.0, 0, 0, 0)
            files: dict[str, bytes] = {}
            if not outcome.killed_for:
                files, refused = box.copy_out(request.collect)
        if outcome.killed_for:
            signal = 9
        _refuse_missing_python(exit_status, outcome)
        return SandboxResult(
            backend=NAME,
            isolation=self.isolation,
            exit_status=exit_status,
            signal=signal,
            timed_out=outcome.killed_for == "wall",
            output=bytes(outcome.output).decode("utf-8", "replace") + left_behind_note(refused),
            output_truncated=outcome.truncated,
            files=files,
            wall_seconds=round(time.monotonic() - started, 3),
            cpu_seconds=round(cpu, 3),
            max_rss_kb=peak_kb,  # the container's peak memory (cgroup), known only after a kill
            limit_hit=_limit_hit(outcome, signal, peak_kb, limit_kb),
        )


def _engine_failure(error: BaseException, tests_ran: bool) -> VerifierError:
    """An engine error before the tests' code ran means no sandbox could be had; after, it is a failed run."""
    if not tests_ran:
        return SandboxUnavailable(
            [(NAME, f"the engine refused or stopped answering: {_first_line(error)}")],
            hint="see 'verifier sandbox doctor'; the engine's own log says more",
        )
    return CannotVerify(
        f"the Docker engine failed while the tests ran or their results were collected: {_first_line(error)}",
        hint="the tests themselves may have caused it (the run's output says more); the engine's log has details",
    )


def _refuse_missing_python(exit_status: int | None, outcome: _Outcome) -> None:
    """An image without ``python`` cannot verify anything: say so instead of reporting a failed run."""
    if exit_status in (126, 127) and bytes(outcome.output[:200]).startswith(b"OCI runtime exec failed"):
        raise SandboxUnavailable(
            [(NAME, "the sandbox image has no 'python' on its PATH")],
            hint="rebuild it with 'verifier sandbox build' or pick another image",
        )
