"""The docker sandbox against a real engine (DOCKER_HOST): the containment corpus, cleanup and images.

Tests marked ``docker`` skip with the reason when no engine answers or the sandbox image is missing,
and fail instead when VERIFIER_REQUIRE_DOCKER=1 (CI sets it). Every docker test also checks that the
engine holds exactly as many containers after it as before it.
"""

from __future__ import annotations

import errno
import os
import signal
import socket
import subprocess
import sys
import textwrap
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from verifier.errors import EXIT_UNVERIFIED, SandboxUnavailable
from verifier.models import Limits, SandboxRequest, SandboxResult
from verifier.sandbox import docker as docker_backend
from verifier.sandbox import images
from verifier.sandbox.docker import EXPIRES_LABEL, LABEL, OWNER_LABEL, DockerBackend, is_orphan
from verifier.sandbox.engine import engine_endpoint

REPO_ROOT = Path(__file__).resolve().parents[1]
FAST = Limits(wall_seconds=30, cpu_seconds=30, memory_mb=256, processes=64, output_bytes=100_000)


def _engine_problem() -> str | None:
    return DockerBackend().problem()


@pytest.fixture(scope="module")
def engine() -> Iterator[object]:
    problem = _engine_problem()
    if problem:
        if os.environ.get("VERIFIER_REQUIRE_DOCKER") == "1":
            pytest.fail(f"VERIFIER_REQUIRE_DOCKER=1 but the docker sandbox cannot run: {problem}")
        pytest.skip(f"docker sandbox unavailable: {problem}")
    client = docker_backend.connect()
    yield client
    client.close()


def _container_count(client: object) -> int:
    return len(client.containers.list(all=True))  # type: ignore[attr-defined]


@pytest.fixture
def docker_engine(engine: object) -> Iterator[object]:
    """The engine, checked to hold as many containers after the test as before it."""
    before = _container_count(engine)
    yield engine
    assert _container_count(engine) == before, "a sandbox container was left behind"


def run_code(tree: Path, code: str, limits: Limits = FAST, **request: object) -> SandboxResult:
    tree.mkdir(parents=True, exist_ok=True)
    (tree / "main.py").write_text(textwrap.dedent(code))
    fields: dict[str, object] = {"env": {}, "collect": (), **request}
    return DockerBackend().run(SandboxRequest(str(tree), ("main.py",), limits=limits, **fields))  # type: ignore[arg-type]


# -- plain runs ---------------------------------------------------------------------------------------
@pytest.mark.docker
def test_command_runs_as_non_root_in_the_workspace_and_files_come_back(docker_engine, tmp_path):
    result = run_code(
        tmp_path / "tree",
        """
        import os
        open("report.xml", "w").write("<testsuite/>")
        print(os.getuid(), os.getcwd(), os.environ["QUILL_MODE"], os.environ["HOME"])
        """,
        env={"QUILL_MODE": "strict", "PATH": "/host/only/bin"},
        collect=("report.xml", "never-written.json"),
    )
    assert result.exit_status == 0, result.output
    assert result.output.split() == ["10001", "/workspace", "strict", "/tmp"]
    assert result.files == {"report.xml": b"<testsuite/>"}
    assert result.backend == "docker" and not result.timed_out and result.limit_hit is None


@pytest.mark.docker
def test_failing_command_reports_its_exit_status(docker_engine, tmp_path):
    result = run_code(tmp_path / "tree", "import sys; print('parcelkit broke'); sys.exit(3)")
    assert (result.exit_status, result.signal) == (3, None)
    assert "parcelkit broke" in result.output


@pytest.mark.docker
def test_the_workspace_is_a_size_limited_tmpfs_not_a_mount_of_the_tree(docker_engine, tmp_path):
    tree = tmp_path / "tree"
    result = run_code(
        tree,
        """
        for line in open("/proc/self/mounts"):
            if " /workspace " in line:
                print(line.strip())
        open("scratch.txt", "w").write("inside only")
        """,
        limits=Limits(wall_seconds=30, workspace_mb=48),
    )
    fields = result.output.split()
    assert fields[1:3] == ["/workspace", "tmpfs"], result.output
    assert "size=49152k" in fields[3]  # 48 MB, as the kernel writes it in /proc/mounts (proc(5))
    assert not (tree / "scratch.txt").exists()


# -- containment corpus -------------------------------------------------------------------------------
@pytest.mark.docker
def test_a_loopback_listener_on_the_host_cannot_be_reached(docker_engine, tmp_path):
    with socket.socket() as listener:
        listener.bind(("127.0.0.1", 0))
        listener.listen()
        listener.setblocking(False)
        port = listener.getsockname()[1]
        result = run_code(
            tmp_path / "tree",
            f"""
            import socket
            for host in ("127.0.0.1", "host.docker.internal", "172.17.0.1"):
                try:
                    socket.create_connection((host, {port}), timeout=3).close()
                    print("reached", host)
                except OSError as error:
                    print("blocked", host, type(error).__name__)
            """,
        )
        with pytest.raises(BlockingIOError):
            listener.accept()  # nobody connected
    assert result.exit_status == 0, result.output
    assert "reached" not in result.output
    assert result.output.count("blocked") == 3


@pytest.mark.docker
def test_nothing_outside_the_workspace_and_tmp_can_be_written(docker_engine, tmp_path):
    result = run_code(
        tmp_path / "tree",
        """
        import os
        for path in ("/etc/quill", "/quill", "/opt/verifier-python/quill", "/usr/lib/quill", "/var/quill"):
            try:
                open(path, "w").write("x")
                print("wrote", path)
            except OSError as error:
                print("refused", path, error.errno)
        open("/tmp/allowed", "w").write("x")
        open("/workspace/allowed", "w").write("x")
        print("tmp and workspace ok")
        """,
    )
    assert result.exit_status == 0, result.output
    assert "wrote" not in result.output
    # EROFS (30) on the read-only root; Linux errno values from errno(3).
    assert result.output.count("refused") == 5 and f" {errno.EROFS}" in result.output
    assert "tmp and workspace ok" in result.output


@pytest.mark.docker
def test_host_home_secret_and_environment_secret_are_invisible(docker_engine, tmp_path, monkeypatch):
    home = tmp_path / "home"
    (home / ".config").mkdir(parents=True)
    secret_file = home / ".config" / "quillfeather-token"
    secret_file.write_text("qf-secret-4242")
    monkeypatch.setenv("HOME", str(home))
    monkeypatch.setenv("QUILLFEATHER_DEPLOY_KEY", "qf-env-secret-9191")
    result = run_code(
        tmp_path / "tree",
        f"""
        import os
        print("file visible:", os.path.exists({str(secret_file)!r}))
        print("root home visible:", os.path.exists("/root/.docker"))
        print("env:", sorted(os.environ))
        try:
            print("pid1 env:", open("/proc/1/environ", "rb").read())
        except PermissionError:
            print("pid1 env: refused")  # the holder runs as another user
        """,
        env={"QUILL_MODE": "strict"},
    )
    assert result.exit_status == 0, result.output
    assert "file visible: False" in result.output
    assert "root home visible: False" in result.output
    assert "qf-secret-4242" not in result.output and "qf-env-secret-9191" not in result.output
    assert "QUILLFEATHER_DEPLOY_KEY" not in result.output


@pytest.mark.docker
def test_process_count_is_capped(docker_engine, tmp_path):
    result = run_code(
        tmp_path / "tree",
        """
        import os, time
        started = 0
        try:
            while started < 1000:
                if os.fork() == 0:
                    time.sleep(30)
                    os._exit(0)
                started += 1
        except OSError as error:
            print("fork refused after", started, error.errno)
        """,
        limits=Limits(wall_seconds=30, processes=40),
    )
    words = result.output.split()
    assert words[:3] == ["fork", "refused", "after"], result.output
    assert int(words[3]) < 40 and int(words[4]) == errno.EAGAIN


@pytest.mark.docker
def test_a_fork_bomb_is_stopped_and_reported(docker_engine, tmp_path):
    result = run_code(
        tmp_path / "tree",
        """
        import os
        while True:
            try:
                os.fork()
            except OSError:
                pass
        """,
        limits=Limits(wall_seconds=2, processes=64),
    )
    assert result.timed_out and result.limit_hit == "wall"
    assert result.exit_status is None and result.signal == signal.SIGKILL


@pytest.mark.docker
def test_a_memory_hog_is_killed_and_reported(docker_engine, tmp_path):
    result = run_code(
        tmp_path / "tree",
        """
        hoard = []
        while True:
            hoard.append(bytearray(8 * 1024 * 1024))
        """,
        limits=Limits(wall_seconds=30, memory_mb=128),
    )
    assert result.signal == signal.SIGKILL and result.exit_status is None
    assert result.limit_hit == "memory" and not result.timed_out


@pytest.mark.docker
def test_an_infinite_loop_is_killed_at_the_wall_limit(docker_engine, tmp_path):
    result = run_code(tmp_path / "tree", "while True:\n    pass\n", limits=Limits(wall_seconds=1.5))
    assert result.timed_out and result.limit_hit == "wall"
    assert result.exit_status is None and result.signal == signal.SIGKILL


@pytest.mark.docker
def test_cpu_time_limit_stops_a_busy_loop(docker_engine, tmp_path):
    result = run_code(tmp_path / "tree", "while True:\n    pass\n", limits=Limits(wall_seconds=60, cpu_seconds=1))
    # RLIMIT_CPU sends SIGXCPU at the soft limit (setrlimit(2)); SIGXCPU is 24 on Linux (signal(7)).
    assert result.signal == signal.SIGXCPU and result.limit_hit == "cpu"
    assert not result.timed_out


@pytest.mark.docker
def test_a_hundred_megabytes_of_output_are_cut_at_the_cap(docker_engine, tmp_path):
    result = run_code(
        tmp_path / "tree",
        """
        import sys
        chunk = "q" * (1024 * 1024)
        for _ in range(100):
            sys.stdout.write(chunk)
        print("finished")
        """,
        limits=Limits(wall_seconds=60, output_bytes=200_000),
    )
    assert result.output_truncated and result.limit_hit == "output"
    assert len(result.output.encode()) <= 200_000
    assert "finished" not in result.output


@pytest.mark.docker
def test_a_disk_filling_write_stops_at_the_workspace_limit(docker_engine, tmp_path):
    result = run_code(
        tmp_path / "tree",
        """
        import os
        block = b"\\0" * (1024 * 1024)
        for path in ("/workspace/fill", "/tmp/fill"):
            written = 0
            try:
                with open(path, "wb") as sink:
                    while written < 4096:
                        sink.write(block)
                        sink.flush()
                        written += 1
            except OSError as error:
                print(path, "stopped after", written, "MB errno", error.errno)
            os.remove(path)
        """,
        limits=Limits(wall_seconds=60, memory_mb=512, workspace_mb=24, tmp_mb=16, file_size_mb=2048),
    )
    assert result.exit_status == 0, result.output
    lines = result.output.splitlines()
    assert len(lines) == 2, result.output
    for line, limit in zip(lines, (24, 16), strict=True):
        megabytes, code = int(line.split()[3]), int(line.split()[-1])
        assert megabytes <= limit and code == errno.ENOSPC, line


@pytest.mark.docker
def test_file_size_limit_refuses_a_large_file(docker_engine, tmp_path):
    result = run_code(
        tmp_path / "tree",
        """
        try:
            open("big", "wb").write(b"\\0" * (8 * 1024 * 1024))
        except OSError as error:
            print("refused", error.errno)
        """,
        limits=Limits(wall_seconds=30, file_size_mb=4),
    )
    # Python ignores SIGXFSZ, so the write fails with EFBIG instead (Python docs, signal module).
    assert result.output.split() == ["refused", str(errno.EFBIG)], result.output


# -- cleanup in every case ----------------------------------------------------------------------------
VERIFIER_CHILD = """
import sys
from verifier.models import Limits, SandboxRequest
from verifier.sandbox.docker import DockerBackend
DockerBackend().run(SandboxRequest(sys.argv[1], ("-c", "import time; time.sleep(120)"), {},
                                   Limits(wall_seconds=120), ()))
"""


def _start_verifier(tree: Path) -> subprocess.Popen[bytes]:
    tree.mkdir(exist_ok=True)
    env = {**os.environ, "PYTHONPATH": str(REPO_ROOT)}
    return subprocess.Popen([sys.executable, "-c", VERIFIER_CHILD, str(tree)], env=env)


def _wait_for_container_of(client: object, pid: int) -> None:
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        for container in client.containers.list(filters={"label": f"{LABEL}=1"}):  # type: ignore[attr-defined]
            if container.labels.get(OWNER_LABEL, "").split("/")[1:2] == [str(pid)]:
                time.sleep(1)  # let the command start inside
                return
        time.sleep(0.2)
    pytest.fail(f"the verifier process {pid} never started its container")


def _containers_of(client: object, pid: int) -> list[object]:
    found = client.containers.list(all=True, filters={"label": f"{LABEL}=1"})  # type: ignore[attr-defined]
    return [c for c in found if c.labels.get(OWNER_LABEL, "").split("/")[1:2] == [str(pid)]]


@pytest.mark.docker
def test_a_killed_verifier_takes_its_container_down_within_seconds(docker_engine, tmp_path):
    """kill -9 skips every finally: the holder sees the verifier's attached stream close and ends the
    container (its command would sleep two minutes), and the engine removes it."""
    child = _start_verifier(tmp_path / "tree")
    _wait_for_container_of(docker_engine, child.pid)
    child.send_signal(signal.SIGKILL)
    child.wait()
    deadline = time.monotonic() + 15  # "a few seconds", with room for a busy CI machine
    while _containers_of(docker_engine, child.pid) and time.monotonic() < deadline:
        time.sleep(0.2)
    assert _containers_of(docker_engine, child.pid) == []
    result = run_code(tmp_path / "next", "print('next run')")
    assert result.exit_status == 0


@pytest.mark.docker
def test_orphans_a_killed_run_left_are_reaped_by_the_next_one(docker_engine, tmp_path):
    """The safety net for an engine that kept a container anyway: labels name a dead owner."""
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    ticks = "0"
    labels = {LABEL: "1", OWNER_LABEL: f"{socket.gethostname()}/{dead.pid}/{ticks}", EXPIRES_LABEL: "9999999999"}
    left = docker_engine.containers.create(images.DEFAULT_IMAGE, ["true"], labels=labels)  # type: ignore[attr-defined]
    assert docker_backend.reap_orphans(docker_engine) >= 1
    import docker

    with pytest.raises(docker.errors.NotFound):
        left.reload()


@pytest.mark.docker
def test_an_interrupted_verifier_removes_its_container(docker_engine, tmp_path):
    before = _container_count(docker_engine)
    child = _start_verifier(tmp_path / "tree")
    _wait_for_container_of(docker_engine, child.pid)
    child.send_signal(signal.SIGINT)  # Ctrl-C: KeyboardInterrupt inside the run
    assert child.wait(timeout=60) != 0
    assert _container_count(docker_engine) == before


def test_orphan_rule_reads_owner_and_expiry_labels():
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    host = socket.gethostname()
    now = time.time()
    mine = docker_backend.owner_label()
    assert not is_orphan({OWNER_LABEL: mine, "verifier.expires": str(now + 60)}, now)
    assert is_orphan({OWNER_LABEL: f"{host}/{dead.pid}/1", "verifier.expires": str(now + 60)}, now)
    assert is_orphan({OWNER_LABEL: mine, "verifier.expires": str(now - 1)}, now)
    assert not is_orphan({OWNER_LABEL: f"another-host/{dead.pid}/1"}, now)
    assert not is_orphan({OWNER_LABEL: "written by someone else"}, now)


# -- unavailable engine or image: exit 3, never a pass -----------------------------------------------
def test_no_engine_is_reported_with_what_to_do(tmp_path, monkeypatch):
    monkeypatch.setenv("DOCKER_HOST", f"unix://{tmp_path}/no-engine.sock")
    backend = DockerBackend()
    assert "no Docker engine answers" in (backend.problem() or "")
    with pytest.raises(SandboxUnavailable) as raised:
        run_code(tmp_path / "tree", "print('never')")
    assert raised.value.exit_code == EXIT_UNVERIFIED
    assert "DOCKER_HOST" in str(raised.value)


@pytest.mark.docker
def test_a_missing_image_is_reported_with_how_to_build_it(docker_engine, tmp_path):
    backend = DockerBackend(image="verifier-sandbox:not-built-anywhere")
    assert "verifier sandbox build" in (backend.problem() or "")
    (tmp_path / "main.py").write_text("print('never')")
    with pytest.raises(SandboxUnavailable) as raised:
        backend.run(SandboxRequest(str(tmp_path), ("main.py",), {}, FAST, ()))
    assert raised.value.exit_code == EXIT_UNVERIFIED


@pytest.mark.docker
def test_a_docker_context_made_by_the_docker_cli_is_honoured(docker_engine, tmp_path, monkeypatch):
    host = engine_endpoint().host
    if not host or not host.startswith("unix://"):
        pytest.skip("needs an engine on a unix socket given by DOCKER_HOST")
    if subprocess.run(["docker", "--version"], capture_output=True).returncode != 0:
        pytest.skip("needs the docker command line to create the context")
    config = tmp_path / "docker-config"
    # The docker CLI itself writes the context store that engine_endpoint() reads.
    for args in (["context", "create", "quill-ci", "--docker", f"host={host}"], ["context", "use", "quill-ci"]):
        subprocess.run(["docker", "--config", str(config), *args], check=True, capture_output=True)
    monkeypatch.delenv("DOCKER_HOST")
    monkeypatch.setenv("DOCKER_CONFIG", str(config))
    endpoint = engine_endpoint()
    assert (endpoint.host, endpoint.source) == (host, "context quill-ci")
    assert run_code(tmp_path / "tree", "print('via context')").output == "via context\n"


# -- images -------------------------------------------------------------------------------------------
def _git(repo: Path, *args: str) -> str:
    done = subprocess.run(["git", *args], cwd=repo, capture_output=True, text=True, check=True)
    return done.stdout.strip()


def _commit(repo: Path, files: dict[str, str], message: str) -> str:
    for name, text in files.items():
        (repo / name).parent.mkdir(parents=True, exist_ok=True)
        (repo / name).write_text(text)
    _git(repo, "add", "-A")
    _git(repo, "-c", "user.name=Quill Dev", "-c", "user.email=dev@quillfeather.example", "commit", "-qm", message)
    return _git(repo, "rev-parse", "HEAD")


PYPROJECT = """
[project]
name = "parcelkit"
dependencies = ["attrs>=22"]
[project.optional-dependencies]
test = ["parcelkit[fast]", "hypothesis>=6"]
docs = ["sphinx"]
[dependency-groups]
dev = ["freezegun", {include-group = "lint"}]
"""


def test_test_dependencies_are_read_from_the_base_revision(tmp_path):
    repo = tmp_path / "parcelkit"
    repo.mkdir()
    _git(repo, "init", "-q")
    base = _commit(
        repo,
        {
            "pyproject.toml": PYPROJECT,
            "requirements-test.txt": "-r requirements/common.txt\nresponses==0.25  # http stubs\n-e .\n",
            "requirements/common.txt": "--index-url https://mirror.quillfeather.example\nidna\n./vendored\n",
            "docs/requirements.txt": "sphinx-theme\n",
        },
        "parcelkit with test dependencies",
    )
    head = _commit(repo, {"requirements-test.txt": "quill-backdoor==6.6\n"}, "a change that edits the deps")
    assert images.repository_test_requirements(str(repo), base) == (
        "attrs>=22", "freezegun", "hypothesis>=6", "idna", "responses==0.25",
    )  # fmt: skip
    assert "quill-backdoor==6.6" in images.repository_test_requirements(str(repo), head)
    assert images.repository_test_requirements(str(repo), None) == ()


def test_image_tags_hash_their_inputs():
    tag = images.sandbox_tag("sha256:base", "3.11", ["idna", "attrs"])
    assert tag == images.sandbox_tag("sha256:base", "3.11", ["attrs", "idna"])
    assert tag != images.sandbox_tag("sha256:base", "3.11", ["attrs"])
    assert tag != images.sandbox_tag("sha256:other", "3.11", ["idna", "attrs"])
    assert tag.startswith("verifier-sandbox:")


def test_dockerfile_pins_the_same_tools_as_the_offline_builder():
    text = (REPO_ROOT / "sandbox_images" / "Dockerfile").read_text()
    for requirement in images.TOOL_REQUIREMENTS:
        assert f'"{requirement}"' in text, f"the Dockerfile lacks {requirement}"
    assert "FROM python:${PYTHON}-slim-bookworm" in text and "LABEL verifier.python=${PYTHON}" in text


@pytest.mark.docker
@pytest.mark.slow
def test_an_image_is_built_for_a_repository_and_reused(docker_engine, tmp_path):
    repo = tmp_path / "parcelkit"
    repo.mkdir()
    _git(repo, "init", "-q")
    # iniconfig is a pytest dependency, so its wheel is already in pip's cache on the host.
    base = _commit(repo, {"requirements-test.txt": "iniconfig>=1\n"}, "parcelkit needs iniconfig")
    lines: list[str] = []
    tag = images.build_image(str(repo), base, lines.append)
    assert any("iniconfig>=1" in line for line in lines)
    again: list[str] = []
    assert images.build_image(str(repo), base, again.append) == tag
    assert any("already built" in line for line in again) and not any("pip:" in line for line in again)
    assert images.image_for(str(repo), base) == tag
    backend = DockerBackend(image=tag)
    (tmp_path / "tree").mkdir()
    (tmp_path / "tree" / "main.py").write_text("import iniconfig, pytest, coverage; print('tools here')")
    result = backend.run(SandboxRequest(str(tmp_path / "tree"), ("main.py",), {}, FAST, ()))
    assert result.output == "tools here\n"


@pytest.mark.docker
def test_doctor_facts_name_the_engine_and_the_image(docker_engine):
    facts = dict(images.docker_facts())
    assert facts["engine address"].startswith(engine_endpoint().host or "default")
    assert "present" in facts["image"]
    # The server version as the engine itself reports it (GET /version).
    assert docker_engine.version()["Version"] in facts["engine"]  # type: ignore[attr-defined]


# -- what comes back out ------------------------------------------------------------------------------
HOSTILE_RESULTS = """
import os
os.makedirs("out/results.jsonl")
for n in range(5):  # a folder of sparse files where a result file should be: 5 GB if streamed out
    with open(f"out/results.jsonl/part{n}", "wb") as handle:
        handle.truncate(1 << 30)
with open("out/big.json", "wb") as handle:  # one sparse regular file, far over the cap
    handle.truncate(1 << 30)
os.symlink("/etc/passwd", "out/link.json")
os.mkfifo("out/pipe.json")
with open("out/fine.json", "w") as handle:
    handle.write("{}")
print("written")
"""


@pytest.mark.docker
def test_copy_out_refuses_what_is_not_a_small_regular_file(docker_engine, tmp_path):
    collect = ("out/results.jsonl", "out/big.json", "out/link.json", "out/pipe.json", "out/fine.json")
    limits = Limits(wall_seconds=30, cpu_seconds=30, memory_mb=256, processes=64, file_size_mb=2048)
    started = time.monotonic()
    result = run_code(tmp_path / "tree", HOSTILE_RESULTS, limits=limits, collect=collect)
    elapsed = time.monotonic() - started
    assert "written" in result.output, result.output
    assert result.files == {"out/fine.json": b"{}"}
    assert "out/results.jsonl: not a regular file" in result.output
    assert "out/big.json: larger than 64 MB" in result.output
    assert "out/link.json: not a regular file" in result.output
    assert "out/pipe.json: not a regular file" in result.output
    # the host's time stays within the run's limits: the wall limit plus the copy-out grace
    assert elapsed < limits.wall_seconds + docker_backend.COPY_OUT_GRACE_SECONDS


def test_an_archive_is_judged_by_its_header_before_its_content():
    """A tar stream whose one member is a directory, or a file over the cap, is refused after reading
    only its header; the stream is never read further (tarfile is the reference for the format)."""
    import io
    import tarfile

    def archive(member: tarfile.TarInfo, content: bytes = b"") -> list[bytes]:
        buffer = io.BytesIO()
        with tarfile.open(fileobj=buffer, mode="w") as tar:
            tar.addfile(member, io.BytesIO(content) if content else None)
        return [buffer.getvalue()]

    folder = tarfile.TarInfo("results.jsonl")
    folder.type = tarfile.DIRTYPE
    deadline = time.monotonic() + 30
    with pytest.raises(docker_backend.CopyOutRefused, match="not a regular file"):
        docker_backend.single_file(iter(archive(folder)), 1000, deadline)
    big = tarfile.TarInfo("results.jsonl")
    big.size = 5000
    with pytest.raises(docker_backend.CopyOutRefused, match="more than"):
        docker_backend.single_file(iter(archive(big, b"x" * 5000)), 1000, deadline)

    def endless() -> Iterator[bytes]:
        yield b"\0" * 512  # no header yet: tarfile keeps reading, the bound stops it
        while True:
            yield b"x" * 65536

    with pytest.raises(docker_backend.CopyOutRefused):
        docker_backend.single_file(endless(), 10_000, deadline)
    small = tarfile.TarInfo("results.jsonl")
    small.size = 3
    assert docker_backend.single_file(iter(archive(small, b"abc")), 1000, deadline) == b"abc"
    with pytest.raises(docker_backend.CopyOutRefused, match="not read within"):
        docker_backend.single_file(iter(archive(small, b"abc")), 1000, time.monotonic() - 1)


def test_the_engine_stat_header_refuses_before_any_byte_is_read():
    # Go's os.FileMode bits (pkg.go.dev/io/fs#FileMode): ModeDir = 1 << 31, ModeSymlink = 1 << 27
    for stat in ({"mode": (1 << 31) | 0o755, "size": 0}, {"mode": (1 << 27) | 0o777, "linkTarget": "/etc"}):
        with pytest.raises(docker_backend.CopyOutRefused, match="not a regular file"):
            docker_backend.refuse_by_stat(stat, 1000)
    with pytest.raises(docker_backend.CopyOutRefused, match="larger"):
        docker_backend.refuse_by_stat({"mode": 0o644, "size": 1001}, 1000)
    docker_backend.refuse_by_stat({"mode": 0o644, "size": 1000}, 1000)


@pytest.mark.docker
def test_the_time_keeper_cannot_be_traced_or_signalled_by_the_tests(docker_engine, tmp_path):
    result = run_code(
        tmp_path / "tree",
        """
        import ctypes, os, signal
        libc = ctypes.CDLL(None, use_errno=True)
        print("ptrace:", libc.ptrace(16, 1, None, None), ctypes.get_errno())  # PTRACE_ATTACH, <sys/ptrace.h>
        try:
            os.kill(1, signal.SIGKILL)
            print("kill: sent")
        except PermissionError:
            print("kill: refused")
        status = open("/proc/1/status").read()
        print("pid1 uid:", [line.split()[1] for line in status.splitlines() if line.startswith("Uid:")][0])
        print("my uid:", os.getuid())
        """,
    )
    assert "ptrace: -1 1" in result.output, result.output  # EPERM
    assert "kill: refused" in result.output
    assert f"pid1 uid: {docker_backend.KEEPER_UID}" in result.output
    assert f"my uid: {docker_backend.SANDBOX_UID}" in result.output


def test_an_engine_error_after_the_tests_started_is_no_missing_sandbox():
    import docker

    error = docker.errors.APIError("500 Server Error: broken pipe")
    before = docker_backend._engine_failure(error, tests_ran=False)
    after = docker_backend._engine_failure(error, tests_ran=True)
    assert isinstance(before, SandboxUnavailable)
    assert not isinstance(after, SandboxUnavailable) and after.exit_code == EXIT_UNVERIFIED
    assert "while the tests ran" in str(after) and "no sandbox could be started" not in str(after)


def test_only_a_full_workspace_is_reported_as_the_workspace_limit():
    import docker

    full = docker_backend._copy_in_failure(docker.errors.APIError("write /workspace/a: no space left on device"), 9, 8)
    other = docker_backend._copy_in_failure(docker.errors.APIError("archive/tar: invalid tar header"), 1, 8)
    assert "workspace limit" in (full.hint or "")
    assert "workspace limit" not in (other.hint or "") and "refused to copy the tree" in str(other)


def test_an_image_chosen_through_the_environment_is_kept_for_every_repository(monkeypatch, tmp_path):
    monkeypatch.setenv(docker_backend.IMAGE_ENV, "quill-sandbox:pinned")
    backend = DockerBackend()
    assert backend.for_repository(str(tmp_path), None) is backend
    assert backend.environment() == "quill-sandbox:pinned"  # the image is part of the cache key


@pytest.mark.docker
def test_a_repository_gets_the_image_built_for_it_through_the_interface(docker_engine, tmp_path, monkeypatch):
    monkeypatch.delenv(docker_backend.IMAGE_ENV, raising=False)
    repo = tmp_path / "repo"
    repo.mkdir()
    subprocess.run(["git", "init", "-q"], cwd=repo, check=True)
    chosen = DockerBackend().for_repository(str(repo), None)
    assert isinstance(chosen, DockerBackend)
    built = images.image_for(str(repo), None)
    assert chosen.environment() == (built or docker_backend.DEFAULT_IMAGE)
