"""Sandbox images for the docker backend, built without any container registry.

Two layers, each tagged with a hash of its inputs so that it is rebuilt only when they change:

* the **base**: a minimal Debian (``debootstrap --variant=minbase`` with python3 and its venv module)
  imported into the engine as an image;
* the **sandbox image**: the base plus a virtual environment holding pytest, coverage and the
  repository's own test dependencies (read from the *base* revision, which the change cannot edit),
  installed inside with ``pip install --no-index`` from wheels fetched on the host.

``python -m verifier.sandbox.images default`` builds the image the project's own CI uses
(``verifier-sandbox:latest``); :func:`build_image` builds one for a repository. :func:`docker_facts`
gives ``verifier sandbox doctor`` what it prints about docker.
"""

from __future__ import annotations

import argparse
import fnmatch
import hashlib
import io
import json
import os
import posixpath
import shutil
import subprocess
import sys
import tarfile
import tempfile
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import TYPE_CHECKING, Any

from verifier.errors import SandboxUnavailable, VerifierError
from verifier.sandbox.engine import DEFAULT_IMAGE, IMAGE_ENV, LABEL, NAME, SANDBOX_UID, WORKSPACE, connect
from verifier.words import counted

if TYPE_CHECKING:  # the Docker SDK ships no type information (the ignore is unused where stubs exist)
    from docker import DockerClient  # type: ignore[import-untyped,unused-ignore]

Progress = Callable[[str], None]

BUILDER_VERSION = "1"  # bump when the build steps below change what an image contains
BASE_REPOSITORY = "verifier-sandbox-base"
IMAGE_REPOSITORY = "verifier-sandbox"
DEBIAN_SUITE = "bookworm"
DEBIAN_PACKAGES = ("python3", "python3-venv")
DEFAULT_MIRROR = "http://deb.debian.org/debian"
MIRROR_ENV = "VERIFIER_DEBIAN_MIRROR"
BUILD_DIR_ENV = "VERIFIER_BUILD_DIR"
# Keep in step with pyproject.toml and sandbox_images/Dockerfile (a test checks the Dockerfiles).
TOOL_REQUIREMENTS = ("pytest>=7.3,<10", "coverage>=7.2,<8", "pytest-xdist>=3.3,<4")
VENV = "/opt/verifier-python"
SYSTEM_PATH = "/usr/local/sbin:/usr/local/bin:/usr/sbin:/usr/bin:/sbin:/bin"
PYTHON_LABEL = "verifier.python"
TEST_EXTRAS = ("test", "tests", "testing", "dev")


def _quiet(_line: str) -> None:
    pass


def _unavailable(reason: str, hint: str | None = None) -> SandboxUnavailable:
    return SandboxUnavailable([(NAME, reason)], hint=hint)


def _digest(*parts: object) -> str:
    return hashlib.sha256(json.dumps(parts, sort_keys=True).encode()).hexdigest()[:16]


def _image_exists(client: DockerClient, tag: str) -> bool:
    import docker

    try:
        client.images.get(tag)
    except docker.errors.ImageNotFound:
        return False
    return True


# -- the base: debootstrap + import ----------------------------------------------------------------
def base_tag() -> str:
    return f"{BASE_REPOSITORY}:{_digest(BUILDER_VERSION, DEBIAN_SUITE, DEBIAN_PACKAGES)}"


def build_base_image(progress: Progress = _quiet, client: DockerClient | None = None) -> str:
    """The base image's tag, building it (debootstrap into a folder, then import) when missing."""
    client = client or connect()
    tag = base_tag()
    if _image_exists(client, tag):
        progress(f"base image {tag} is already built")
        return tag
    _require_debootstrap()
    root = Path(tempfile.mkdtemp(prefix="verifier-rootfs-", dir=os.environ.get(BUILD_DIR_ENV)))
    try:
        _debootstrap(root, progress)
        python = _rootfs_python(root)
        _trim(root)
        progress(f"importing {root} as {tag}")
        _import_rootfs(client, root, tag, python)
    finally:
        shutil.rmtree(root, ignore_errors=True)
    progress(f"base image {tag} built (Debian {DEBIAN_SUITE}, Python {python})")
    return tag


def _require_debootstrap() -> None:
    if shutil.which("debootstrap") is None:
        raise _unavailable(
            "the offline image builder needs debootstrap",
            hint="apt-get install -y debootstrap (or build from sandbox_images/Dockerfile with a registry)",
        )
    if os.geteuid() != 0:
        raise _unavailable("debootstrap must run as root", hint="run the build as root (for example in CI)")


def _debootstrap(root: Path, progress: Progress) -> None:
    mirror = os.environ.get(MIRROR_ENV) or DEFAULT_MIRROR
    command = [
        "debootstrap",
        "--variant=minbase",
        f"--include={','.join(DEBIAN_PACKAGES)}",
        DEBIAN_SUITE,
        str(root),
        mirror,
    ]
    progress(f"debootstrap {DEBIAN_SUITE} from {mirror} (about a minute)")
    _stream(command, progress, what="debootstrap")


def _stream(command: list[str], progress: Progress, what: str) -> None:
    """Run a host command, passing its output lines to ``progress``; fail with its last lines."""
    tail: list[str] = []
    with subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True) as process:
        assert process.stdout is not None
        for line in process.stdout:
            tail = [*tail[-19:], line.rstrip()]
            progress(f"{what}: {line.rstrip()}")
    if process.returncode != 0:
        raise _unavailable(f"{what} failed (exit {process.returncode}): {' | '.join(tail[-5:])}")


def _rootfs_python(root: Path) -> str:
    """The X.Y of the rootfs's python3 (Debian links /usr/bin/python3 to python3.X)."""
    target = os.readlink(root / "usr/bin/python3")
    return target.removeprefix("python")


def _trim(root: Path) -> None:
    for folder in ("var/cache/apt/archives", "var/lib/apt/lists", "usr/share/doc", "usr/share/man"):
        for entry in (root / folder).glob("*"):
            if entry.is_file() or entry.is_symlink():
                entry.unlink()
            elif entry.is_dir() and entry.name != "partial":
                shutil.rmtree(entry, ignore_errors=True)


def _import_rootfs(client: DockerClient, root: Path, tag: str, python: str) -> None:
    repository, version = tag.split(":")
    changes = [f"ENV PATH={SYSTEM_PATH}", f"LABEL {PYTHON_LABEL}={python}", 'CMD ["python3"]']
    with subprocess.Popen(["tar", "--numeric-owner", "-C", str(root), "-c", "."], stdout=subprocess.PIPE) as archive:
        client.api.import_image(
            src=archive.stdout, repository=repository, tag=version, changes=changes, stream_src=True
        )
    if archive.returncode != 0:
        raise _unavailable(f"tar of the base rootfs failed (exit {archive.returncode})")


# -- the sandbox image: base + venv with pytest, coverage and the repository's test deps --------------
def sandbox_tag(base_id: str, python: str, requirements: Iterable[str]) -> str:
    settings = _image_settings(python)
    inputs = (BUILDER_VERSION, base_id, python, TOOL_REQUIREMENTS, sorted(requirements), INSTALL_SCRIPT, settings)
    return f"{IMAGE_REPOSITORY}:{_digest(*inputs)}"


def build_sandbox_image(
    requirements: Iterable[str] = (),
    progress: Progress = _quiet,
    client: DockerClient | None = None,
) -> str:
    """The tag of base + pytest + coverage + ``requirements``, building what is missing."""
    client = client or connect()
    base = client.images.get(build_base_image(progress, client))
    python = base.labels.get(PYTHON_LABEL, "")
    wanted = sorted(set(requirements))
    tag = sandbox_tag(base.id, python, wanted)
    if _image_exists(client, tag):
        progress(f"sandbox image {tag} is already built")
        return tag
    with tempfile.TemporaryDirectory(prefix="verifier-wheels-", dir=os.environ.get(BUILD_DIR_ENV)) as wheels:
        _fetch_wheels(Path(wheels), [*TOOL_REQUIREMENTS, *wanted], python, progress)
        _install_in_container(client, base.id, Path(wheels), tag, python, progress)
    progress(f"sandbox image {tag} built")
    return tag


def _fetch_wheels(folder: Path, requirements: list[str], python: str, progress: Progress) -> None:
    """Wheels for ``requirements`` into ``folder``, fetched by the host's pip for the image's Python."""
    listing = folder / "requirements.txt"
    listing.write_text("".join(f"{line}\n" for line in requirements))
    host = f"{sys.version_info.major}.{sys.version_info.minor}"
    pip = [sys.executable, "-m", "pip", "--disable-pip-version-check"]
    if python == host:
        # Same interpreter line as the image: pip may also build pure-Python sdists into wheels here.
        command = [*pip, "wheel", "--wheel-dir", str(folder), "-r", str(listing)]
    else:
        platforms = [f"--platform=manylinux_2_{minor}_x86_64" for minor in range(17, 37)]
        command = [
            *pip, "download", "--only-binary=:all:", f"--python-version={python}", "--implementation=cp",
            *platforms, "--dest", str(folder), "-r", str(listing),
        ]  # fmt: skip
    progress(f"fetching wheels for {counted(len(requirements), 'requirement')} for Python {python}")
    _stream(command, progress, what="pip")


INSTALL_SCRIPT = f"""\
set -e
python3 -m venv {VENV}
{VENV}/bin/python -m pip install --no-index --no-cache-dir --disable-pip-version-check \\
    --find-links /tmp/wheels -r /tmp/wheels/requirements.txt
grep -q '^sandbox:' /etc/passwd \\
    || echo 'sandbox:x:{SANDBOX_UID}:{SANDBOX_UID}:sandbox:/tmp:/usr/sbin/nologin' >> /etc/passwd
grep -q '^sandbox:' /etc/group || echo 'sandbox:x:{SANDBOX_UID}:' >> /etc/group
mkdir -p {WORKSPACE}
rm -rf /tmp/wheels
{VENV}/bin/python -m pytest --version
{VENV}/bin/python -m coverage --version | head -1
"""


def _install_in_container(
    client: DockerClient, base_id: str, wheels: Path, tag: str, python: str, progress: Progress
) -> None:
    """Install the wheels in a container of the base (no network), then commit it as ``tag``."""
    container = client.containers.create(
        base_id, ["sh", "-c", INSTALL_SCRIPT], network_mode="none", labels={f"{LABEL}.build": "1"}
    )
    try:
        container.put_archive("/tmp", _folder_archive(wheels, "wheels"))
        container.start()
        for line in container.logs(stream=True, follow=True):
            progress(f"install: {line.decode('utf-8', 'replace').rstrip()}")
        status = container.wait().get("StatusCode")
        if status != 0:
            tail = container.logs(tail=5).decode("utf-8", "replace").strip().replace("\n", " | ")
            raise _unavailable(f"installing the wheels in the image failed (exit {status}): {tail}")
        repository, version = tag.split(":")
        container.commit(repository, version, changes=_image_settings(python))
    finally:
        container.remove(force=True, v=True)


def _image_settings(python: str) -> list[str]:
    return [
        f"ENV PATH={VENV}/bin:{SYSTEM_PATH}",
        f"USER {SANDBOX_UID}:{SANDBOX_UID}",
        f"WORKDIR {WORKSPACE}",
        f"LABEL {PYTHON_LABEL}={python}",
        'CMD ["python"]',
    ]


def _folder_archive(folder: Path, name: str) -> bytes:
    buffer = io.BytesIO()
    with tarfile.open(fileobj=buffer, mode="w") as archive:
        archive.add(folder, arcname=name)
    return buffer.getvalue()


# -- the repository's own test dependencies, read from the base revision ------------------------------
def _git_text(repo_path: str, revision: str, path: str) -> str | None:
    from verifier.gitio import Git

    content = Git(repo_path).show_file(revision, path)
    return None if content is None else content.decode("utf-8", "replace")


def _requirement_files(repo_path: str, revision: str) -> list[str]:
    from verifier.gitio import Git

    listing = Git(repo_path).run(["ls-tree", "-r", "-z", "--name-only", "--full-tree", revision])
    names = [name.decode("utf-8", "surrogateescape") for name in listing.split(b"\0") if name]
    top = [n for n in names if "/" not in n and fnmatch.fnmatch(n, "*requirements*.txt")]
    nested = [n for n in names if n.startswith("requirements/") and n.endswith(".txt")]
    return sorted(top + nested)


def parse_requirements(text: str, read: Callable[[str], str | None], here: str = "") -> list[str]:
    """PEP 508 lines of a requirements file, following ``-r`` includes; options and paths are skipped."""
    found: list[str] = []
    for raw in text.splitlines():
        line = raw.split(" #", 1)[0].strip()
        if not line or line.startswith("#"):
            continue
        include = _include_target(line)
        if include is not None:
            nested = read(posixpath.normpath(posixpath.join(here, include)))
            if nested is not None:
                found += parse_requirements(nested, read, posixpath.dirname(posixpath.join(here, include)))
        elif not line.startswith(("-", ".", "/")):
            found.append(line)
    return found


def _include_target(line: str) -> str | None:
    for option in ("-r", "--requirement"):
        if line.startswith(option + " ") or line.startswith(option + "="):
            return line[len(option) + 1 :].strip()
    return None


def pyproject_requirements(text: str) -> list[str]:
    """``[project]`` dependencies, its test extras and test dependency groups (PEP 621, PEP 735)."""
    if sys.version_info >= (3, 11):
        import tomllib
    else:
        import tomli as tomllib
    data = tomllib.loads(text)
    project = data.get("project", {})
    found = list(project.get("dependencies", []))
    extras = project.get("optional-dependencies", {})
    groups = data.get("dependency-groups", {})
    for name in TEST_EXTRAS:
        found += extras.get(name, [])
        found += [entry for entry in groups.get(name, []) if isinstance(entry, str)]
    own = _canonical(project.get("name", ""))
    return [line for line in found if not own or _requirement_name(line) != own]


def _canonical(name: str) -> str:
    return name.lower().replace("_", "-").replace(".", "-")


def _requirement_name(line: str) -> str | None:
    from packaging.requirements import InvalidRequirement, Requirement

    try:
        return _canonical(Requirement(line).name)
    except InvalidRequirement:
        return None


def repository_test_requirements(repo_path: str, base_revision: str | None) -> tuple[str, ...]:
    """The repository's test dependencies at ``base_revision`` (None: the empty tree, so none)."""
    if base_revision is None:
        return ()

    def read(path: str) -> str | None:
        return _git_text(repo_path, base_revision, path)

    found: list[str] = []
    for path in _requirement_files(repo_path, base_revision):
        found += parse_requirements(read(path) or "", read, posixpath.dirname(path))
    pyproject = read("pyproject.toml")
    if pyproject is not None:
        found += pyproject_requirements(pyproject)
    valid = [line for line in found if _requirement_name(line) is not None]
    return tuple(sorted(set(valid)))


def build_image(repo_path: str, base_revision: str | None, progress: Progress = _quiet) -> str:
    """Build (or find) the sandbox image for a repository: base + pytest + coverage + its test deps."""
    requirements = repository_test_requirements(repo_path, base_revision)
    progress(f"test dependencies at the base revision: {', '.join(requirements) or 'none'}")
    return build_sandbox_image(requirements, progress)


def image_for(repo_path: str, base_revision: str | None, client: DockerClient | None = None) -> str | None:
    """The repository's sandbox image tag when it is already built, else None (nothing is built)."""
    client = client or connect()
    if not _image_exists(client, base_tag()):
        return None
    base = client.images.get(base_tag())
    requirements = repository_test_requirements(repo_path, base_revision)
    tag = sandbox_tag(base.id, base.labels.get(PYTHON_LABEL, ""), requirements)
    return tag if _image_exists(client, tag) else None


def build_default_image(progress: Progress = _quiet) -> str:
    """base + pytest + coverage, also tagged as the backend's default image."""
    client = connect()
    tag = build_sandbox_image((), progress, client)
    repository, version = DEFAULT_IMAGE.split(":")
    client.images.get(tag).tag(repository, version)
    progress(f"tagged {tag} as {DEFAULT_IMAGE}")
    return tag


# -- doctor -------------------------------------------------------------------------------------------
def docker_facts(image: str | None = None) -> list[tuple[str, str]]:
    """What ``verifier sandbox doctor`` shows about docker: engine, versions, images, builder tools."""
    from verifier.sandbox.engine import engine_endpoint

    image = image or os.environ.get(IMAGE_ENV) or DEFAULT_IMAGE
    facts: list[tuple[str, str]] = [("docker SDK", _sdk_version())]
    try:
        endpoint = engine_endpoint()
        facts.append(("engine address", f"{endpoint.host or 'default socket'} ({endpoint.source})"))
        client = connect(timeout=10)
    except SandboxUnavailable:  # why, and what to do, is the backend's problem, which the doctor prints once
        return [*facts, ("engine", "not answering")]
    try:
        facts += _engine_facts(client, image)
    finally:
        client.close()
    return facts


def _engine_facts(client: DockerClient, image: str) -> list[tuple[str, str]]:
    version: dict[str, Any] = client.version()
    info: dict[str, Any] = client.info()
    facts = [
        ("engine", f"{version.get('Version')} (API {version.get('ApiVersion')}), {info.get('OperatingSystem')}"),
        ("cgroups", f"v{info.get('CgroupVersion', '?')} ({info.get('CgroupDriver', '?')})"),
        ("image", _image_fact(client, image)),
        ("base image", f"{base_tag()} {'present' if _image_exists(client, base_tag()) else 'not built'}"),
        ("offline builder", _builder_fact()),
    ]
    return facts


def _image_fact(client: DockerClient, image: str) -> str:
    if not _image_exists(client, image):
        return f"{image} missing: run 'verifier sandbox build' (offline: sandbox_images/build-offline)"
    labels = client.images.get(image).labels
    return f"{image} present (Python {labels.get(PYTHON_LABEL, 'unknown')})"


def _builder_fact() -> str:
    if shutil.which("debootstrap") is None:
        return "debootstrap missing: apt-get install -y debootstrap"
    return "debootstrap found" + ("" if os.geteuid() == 0 else " (needs root to run)")


def _sdk_version() -> str:
    try:
        import docker
    except ImportError:
        return "not installed: pip install 'verifier[docker]'"
    return str(docker.__version__)


# -- command line (used by sandbox_images/build-offline and .ci/docker-up) -----------------------------
def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m verifier.sandbox.images", description=__doc__.splitlines()[0])
    commands = parser.add_subparsers(dest="command", required=True)
    commands.add_parser("base", help="build the Debian base image")
    commands.add_parser("default", help=f"build base + pytest + coverage, tagged {DEFAULT_IMAGE}")
    repo = commands.add_parser("repo", help="build the image for a repository's base revision")
    repo.add_argument("path")
    repo.add_argument("revision")
    commands.add_parser("facts", help="print what doctor knows about docker")
    args = parser.parse_args(argv)

    def progress(line: str) -> None:
        print(line, file=sys.stderr, flush=True)

    try:
        if args.command == "facts":
            for key, value in docker_facts():
                print(f"{key}: {value}")
            return 0
        builders = {
            "base": lambda: build_base_image(progress),
            "default": lambda: build_default_image(progress),
            "repo": lambda: build_image(args.path, args.revision, progress),
        }
        print(builders[args.command]())
    except VerifierError as error:
        print(f"verifier.sandbox.images: {error}", file=sys.stderr)
        return error.exit_code
    return 0


if __name__ == "__main__":
    sys.exit(main())
