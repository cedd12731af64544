"""Containment tests of the namespace sandbox: real namespaces and processes, every effect checked on the host.

Each run gets a unique marker in its command line and environment; afterwards the host's /proc must hold
no process carrying it, and the private temp folder the backend used must be empty again.
"""

from __future__ import annotations

import ast
import os
import signal
import socket
import subprocess
import sys
import tempfile
import textwrap
import time
import uuid
from collections.abc import Callable
from pathlib import Path

import pytest
from conftest import processes_carrying

from verifier.models import Limits, SandboxRequest, SandboxResult
from verifier.sandbox import Backend
from verifier.sandbox.namespace import NamespaceBackend, interpreter_paths
from verifier.sandbox.process import ProcessBackend

pytestmark = pytest.mark.namespace
ROOT = Path(__file__).resolve().parent.parent
Runner = Callable[..., SandboxResult]


@pytest.fixture(scope="module")
def backend() -> NamespaceBackend:
    namespace = NamespaceBackend()
    problem = namespace.problem()
    if problem is not None:
        if os.environ.get("VERIFIER_REQUIRE_NAMESPACE") == "1":
            pytest.fail(f"the namespace sandbox is required here but does not work: {problem}")
        pytest.skip(f"the namespace sandbox does not work here: {problem}")
    return namespace


@pytest.fixture
def run(backend: NamespaceBackend, tree: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Runner:
    """Run Python code in the sandbox; then check that no process and no temp folder of it is left."""
    private_temp = tmp_path / "temp"
    private_temp.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(private_temp))

    def run_code(
        code: str,
        sandbox: Backend = backend,
        collect: tuple[str, ...] = (),
        env: dict[str, str] | None = None,
        **limits: float,
    ) -> SandboxResult:
        marker = f"verifier-test-{uuid.uuid4().hex}"
        request = SandboxRequest(
            tree=str(tree),
            python_args=("-c", f"# {marker}\n{textwrap.dedent(code)}"),
            env={"MARKER": marker, **(env or {})},
            limits=Limits(**{"wall_seconds": 30, **limits}),
            collect=collect,
        )
        result = sandbox.run(request)
        assert processes_carrying(marker) == []
        assert os.listdir(private_temp) == []
        return result

    return run_code


def test_a_normal_run_brings_back_the_files_it_wrote(run: Runner, tree: Path) -> None:
    (tree / "leak").symlink_to("/etc/hostname")  # a symlink out of the workspace is never followed
    result = run(
        """
        import os
        os.makedirs("out")
        with open("out/result.txt", "w") as handle:
            handle.write(open("given.txt").read().upper())
        print("cwd", os.getcwd())
    """,
        collect=("out/result.txt", "missing.txt", "leak", "../config.json"),
    )
    assert result.exit_status == 0, result.output
    assert result.files == {"out/result.txt": b"FROM THE TREE\n"}
    assert result.limit_hit is None and not result.timed_out
    assert (tree / "out").exists() is False  # the tree itself is never written


def test_a_listener_on_the_hosts_loopback_is_unreachable(run: Runner) -> None:
    with socket.socket() as listener:
        listener.bind(("127.0.0.1", 0))
        listener.listen()
        listener.setblocking(False)
        port = listener.getsockname()[1]
        code = f"""
            import socket
            try:
                socket.create_connection(("127.0.0.1", {port}), timeout=3).close()
                print("connected")
            except OSError as error:
                print("connect failed:", error)
        """
        result = run(code)
        assert "connect failed" in result.output
        with pytest.raises(BlockingIOError):
            listener.accept()
        # Control: the same code outside the namespace sandbox does reach the listener.
        assert "connected" in run(code, sandbox=ProcessBackend()).output
        listener.accept()[0].close()


def test_nothing_can_be_written_outside_the_workspace(run: Runner, tree: Path, tmp_path: Path) -> None:
    host_folder = tmp_path / "host-folder"
    host_folder.mkdir()
    name = f"verifier-probe-{uuid.uuid4().hex}"
    targets = [Path("/") / name, Path("/usr") / name, Path("/etc") / name, host_folder / name, tree / name]
    tree_before = sorted(os.listdir(tree))
    result = run(
        f"""
        import os
        for path in {[str(t) for t in targets]!r}:
            try:
                os.makedirs(os.path.dirname(path), exist_ok=True)
                with open(path, "w") as handle:
                    handle.write("escaped")
                print("written inside the sandbox:", path)
            except OSError as error:
                print("refused:", path, error.strerror)
        open("in-workspace.txt", "w").write("fine")
    """,
        collect=("in-workspace.txt",),
    )
    assert result.files == {"in-workspace.txt": b"fine"}
    for target in targets:
        assert not target.exists(), f"{target} appeared on the host"
    assert sorted(os.listdir(tree)) == tree_before
    for read_only in targets[:3]:
        assert f"refused: {read_only} Read-only file system" in result.output


def test_home_and_the_parents_environment_stay_secret(
    run: Runner, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    secret = f"secret-{uuid.uuid4().hex}"
    fake_home = tmp_path / "home"
    fake_home.mkdir()
    (fake_home / "token.txt").write_text(secret)
    real_home = Path(os.path.expanduser("~"))
    planted = real_home / f".verifier-test-{uuid.uuid4().hex}"
    planted.write_text(secret)
    monkeypatch.setenv("HOME", str(fake_home))
    monkeypatch.setenv("VERIFIER_TEST_SECRET", secret)
    try:
        result = run(f"""
            import os
            print(sorted(os.environ.items()))
            for path in ({str(fake_home / "token.txt")!r}, {str(planted)!r}, "/proc/1/environ"):
                try:
                    print(open(path).read())
                except OSError as error:
                    print("cannot read", path, error.strerror)
            try:
                print("home listing:", sorted(os.listdir({str(real_home)!r})))
            except OSError as error:
                print("home listing failed:", error.strerror)
        """)
    finally:
        planted.unlink()
    assert result.exit_status == 0, result.output
    assert secret not in result.output
    assert "cannot read /proc/1/environ Permission denied" in result.output  # the init's, not readable
    # Of the real home the sandbox may show only the way down to the interpreter's own folders.
    allowed = {
        Path(p).relative_to(real_home).parts[0] for p in interpreter_paths() if Path(p).is_relative_to(real_home)
    }
    listing = result.output.split("home listing:")[-1].strip()
    shown = set(ast.literal_eval(listing)) if listing.startswith("[") else set()
    assert shown <= allowed
    assert planted.name not in shown


def test_a_fork_bomb_runs_into_the_process_limit(run: Runner) -> None:
    result = run(
        """
        import os, time
        children = 0
        try:
            while True:
                if os.fork() == 0:
                    time.sleep(120)
                    os._exit(0)
                children += 1
        finally:
            print("children:", children, flush=True)
    """,
        processes=24,
    )
    assert result.limit_hit == "processes", result.output
    assert int(result.output.split("children:")[1].split()[0]) < 24


def test_an_endless_fork_bomb_is_killed_at_the_wall_limit(run: Runner) -> None:
    result = run(
        """
        import os
        while True:
            try:
                os.fork()
            except OSError:
                pass
    """,
        processes=32,
        wall_seconds=3,
    )
    assert result.timed_out and result.limit_hit == "wall"
    assert result.exit_status is None and result.signal == signal.SIGKILL


def test_a_memory_hog_gets_a_memory_error(run: Runner) -> None:
    result = run(
        """
        hog = bytearray(8 << 30)
        print("allocated", len(hog))
    """,
        memory_mb=512,
    )
    assert result.exit_status == 1 and "allocated" not in result.output
    assert result.limit_hit == "memory"


def test_an_endless_loop_is_killed_at_the_wall_limit(run: Runner) -> None:
    result = run("while True: pass", wall_seconds=2)
    assert result.timed_out and result.limit_hit == "wall" and result.exit_status is None


def test_a_flood_of_output_is_capped_and_stopped(run: Runner) -> None:
    result = run(
        """
        import sys
        chunk = b"x" * (1 << 20)
        for _ in range(100):
            sys.stdout.buffer.write(chunk)
        print("finished")
    """,
        output_bytes=10_000,
    )
    assert result.output_truncated and result.limit_hit == "output"
    assert len(result.output) < 10_200
    assert "finished" not in result.output


def test_a_file_larger_than_the_file_size_limit_cannot_be_written(run: Runner) -> None:
    result = run(
        """
        with open("big.bin", "wb") as handle:
            handle.write(b"x" * (3 << 20))
    """,
        file_size_mb=1,
    )
    assert result.exit_status == 1 and result.limit_hit == "file-size", result.output


_PARENT = """
import sys, time
from verifier.models import Limits, SandboxRequest
from verifier.sandbox.namespace import NamespaceBackend
request = SandboxRequest(tree=sys.argv[1], python_args=("-c", "# " + sys.argv[2][::-1] + "\\nwhile True: pass"),
                         env={}, limits=Limits(wall_seconds=120), collect=())
try:
    NamespaceBackend().run(request)
except KeyboardInterrupt:
    print("interrupted", flush=True)
    sys.exit(130)
"""


def _start_parent(tree: Path, temp: Path, marker: str) -> subprocess.Popen[str]:
    """A separate verifier-like process running an endless command, once that command is running."""
    # The marker goes in reversed, so that only the sandboxed command carries it, not this parent.
    parent = subprocess.Popen(
        [sys.executable, "-c", _PARENT, str(tree), marker[::-1]],
        text=True,
        stdout=subprocess.PIPE,
        env={**os.environ, "PYTHONPATH": str(ROOT), "TMPDIR": str(temp)},
    )
    for _ in range(300):
        if processes_carrying(marker):
            return parent
        time.sleep(0.05)
    parent.kill()
    pytest.fail("the sandboxed command never started")


def _wait_until_gone(marker: str) -> list[int]:
    for _ in range(200):
        left = processes_carrying(marker)
        if not left:
            return left
        time.sleep(0.05)
    return left


def test_ctrl_c_in_the_parent_cleans_up_and_re_raises(backend: NamespaceBackend, tree: Path, tmp_path: Path) -> None:
    marker = f"verifier-test-{uuid.uuid4().hex}"
    temp = tmp_path / "temp"
    temp.mkdir()
    parent = _start_parent(tree, temp, marker)
    parent.send_signal(signal.SIGINT)
    stdout, _ = parent.communicate(timeout=60)
    assert parent.returncode == 130 and "interrupted" in stdout
    assert processes_carrying(marker) == []
    assert os.listdir(temp) == []


def test_kill_9_of_the_parent_leaves_no_process(backend: NamespaceBackend, tree: Path, tmp_path: Path) -> None:
    marker = f"verifier-test-{uuid.uuid4().hex}"
    temp = tmp_path / "temp"
    temp.mkdir()
    parent = _start_parent(tree, temp, marker)
    parent.kill()
    parent.wait()
    assert _wait_until_gone(marker) == []  # the kernel's parent-death signals, not our cleanup, did this


UNSHARE_USER = """
import ctypes
libc = ctypes.CDLL(None, use_errno=True)
code = libc.unshare(0x10000000)  # CLONE_NEWUSER, <linux/sched.h>
print("unshare:", code, ctypes.get_errno())
"""
NESTED = (
    UNSHARE_USER
    + """
import os, subprocess, threading
for command in (["unshare", "-U", "true"], ["unshare", "-Ur", "true"]):
    try:
        done = subprocess.run(command, capture_output=True)
        print(" ".join(command), "exit:", done.returncode)
    except OSError as error:
        print(" ".join(command), "oserror:", error.errno)
ran = []
thread = threading.Thread(target=ran.append, args=("thread",))
thread.start()
thread.join()
child = os.fork()
if child == 0:
    os._exit(7)
print("ordinary:", ran, subprocess.run(["true"]).returncode, os.waitstatus_to_exitcode(os.waitpid(child, 0)[1]))
"""
)


def test_no_nested_user_namespace_can_be_made_inside(run: Runner) -> None:
    """unshare(2) with CLONE_NEWUSER fails (EPERM) in Python and in util-linux's unshare(1); threads,
    subprocesses and fork still work (clone3 answers ENOSYS: the C library falls back to clone)."""
    result = run(NESTED)
    assert result.exit_status == 0, result.output
    assert "unshare: -1 1\n" in result.output  # -1 with errno 1 = EPERM
    assert "unshare -U true exit: 0" not in result.output and "unshare -Ur true exit: 0" not in result.output
    assert "unshare -U true" in result.output  # the command was there to try (or its absence was reported)
    assert "ordinary: ['thread'] 0 7" in result.output


def test_the_kernel_surface_no_test_needs_is_refused(run: Runner) -> None:
    result = run(
        """
        import ctypes, errno
        libc = ctypes.CDLL(None, use_errno=True)
        for name, number in (("keyctl", 250), ("bpf", 321), ("userfaultfd", 323), ("perf_event_open", 298)):
            code = libc.syscall(number, 0, 0, 0, 0, 0)
            print(name, code, ctypes.get_errno())
        """
    )
    if os.uname().machine != "x86_64":
        pytest.skip("the syscall numbers in this test are x86_64's")
    for name in ("keyctl", "bpf", "userfaultfd", "perf_event_open"):
        assert f"{name} -1 1\n" in result.output, result.output  # -1 with EPERM


def test_nested_namespaces_work_on_this_host_outside_the_sandbox() -> None:
    """The reference for the test above: here, outside the sandbox, the same call is allowed, so the
    refusal inside is the sandbox's doing (skipped where the host itself forbids it)."""
    done = subprocess.run([sys.executable, "-c", UNSHARE_USER], capture_output=True, text=True)
    if done.stdout.strip() != "unshare: 0 0":
        pytest.skip(f"this host refuses user namespaces itself: {done.stdout.strip()}")
    assert done.returncode == 0


def test_the_doctor_says_whether_the_whole_run_has_one_memory_limit(backend: NamespaceBackend) -> None:
    from verifier.sandbox.cgroup import whole_run_problem

    facts = dict(backend.facts())
    problem = whole_run_problem()
    if problem is None:
        assert facts["memory of the whole run"] == "limited by a cgroup v2 of its own"
    else:
        assert problem in facts["memory of the whole run"]
        assert "each process has its own limit" in facts["memory of the whole run"]


def test_many_children_together_run_into_the_whole_run_memory_limit(run: Runner) -> None:
    """Eight children of 96 MB each stay under the per-process limit (256 MB) but not under the
    run's (256 MB in all): the kernel ends one of them, and the result says it was memory."""
    from verifier.sandbox.cgroup import whole_run_problem

    problem = whole_run_problem()
    if problem is not None:
        pytest.skip(f"no whole-run memory limit here: {problem}")
    result = run(
        """
        import os, time
        children = []
        for _ in range(8):
            pid = os.fork()
            if pid == 0:
                block = bytearray(96 << 20)
                for i in range(0, len(block), 4096):
                    block[i] = 1
                time.sleep(5)
                os._exit(0)
            children.append(pid)
        codes = [os.waitstatus_to_exitcode(os.waitpid(pid, 0)[1]) for pid in children]
        print("codes:", codes)
        """,
        memory_mb=256,
    )
    assert "-9" in result.output.split("codes:")[-1], result.output
    assert result.limit_hit == "memory"


def test_copy_out_refuses_what_is_not_a_small_regular_file(run: Runner) -> None:
    """A folder of sparse files, a sparse 1 GB file, a link to a host file and a FIFO in place of result
    files: none is read on the host (the run fixture checks its temp folder is empty afterwards)."""
    from test_sandbox_docker import HOSTILE_RESULTS

    collect = ("out/results.jsonl", "out/big.json", "out/link.json", "out/pipe.json", "out/fine.json")
    result = run(HOSTILE_RESULTS, collect=collect, file_size_mb=2048, workspace_mb=64)
    assert "written" in result.output, result.output
    assert result.files == {"out/fine.json": b"{}"}
    assert "out/big.json" in result.output  # named as left behind, larger than the cap


def test_a_tree_too_large_for_the_workspace_says_so_and_only_that(backend: NamespaceBackend, tmp_path: Path) -> None:
    from verifier.errors import CannotVerify

    tree = tmp_path / "big-tree"
    tree.mkdir()
    (tree / "blob.bin").write_bytes(os.urandom(3 << 20))
    request = SandboxRequest(str(tree), ("-c", "pass"), {}, Limits(wall_seconds=30, workspace_mb=1), ())
    with pytest.raises(CannotVerify, match="does not fit the 1 MB workspace") as raised:
        backend.run(request)
    assert "workspace limit" in (raised.value.hint or "")
    assert "user namespaces" not in (raised.value.hint or "")
