"""Reaching the Docker engine: where it is (DOCKER_HOST, a Docker context, the default socket) and a
client that answers, plus the names the docker backend and its image builder share. The Docker SDK is
imported only when a client is actually asked for."""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from verifier.errors import SandboxUnavailable

if TYPE_CHECKING:
    from docker import DockerClient  # type: ignore[import-untyped,unused-ignore]

NAME = "docker"
DEFAULT_IMAGE = "verifier-sandbox:latest"
IMAGE_ENV = "VERIFIER_SANDBOX_IMAGE"
WORKSPACE = "/workspace"
SANDBOX_UID = 10001  # the image's ``sandbox`` user; numeric, so it works in any image
LABEL = "verifier.sandbox"


@dataclass(frozen=True)
class Endpoint:
    """Where the engine is and how to reach it: from DOCKER_HOST, the current context, or the default."""

    host: str | None  # None: the SDK's default socket
    source: str  # "DOCKER_HOST", "context <name>" or "default"
    tls_dir: str | None = None


def docker_config_dir() -> Path:
    return Path(os.environ.get("DOCKER_CONFIG") or Path.home() / ".docker")


def current_context() -> str:
    """The context the docker command line would use (DOCKER_CONTEXT, else config.json's currentContext)."""
    if os.environ.get("DOCKER_CONTEXT"):
        return os.environ["DOCKER_CONTEXT"]
    try:
        config = json.loads((docker_config_dir() / "config.json").read_text())
    except (OSError, ValueError):
        return "default"
    return str(config.get("currentContext") or "default")


def engine_endpoint() -> Endpoint:
    """DOCKER_HOST wins; else a simple (host and optional TLS files) Docker context; else the default."""
    if os.environ.get("DOCKER_HOST"):
        return Endpoint(os.environ["DOCKER_HOST"], "DOCKER_HOST")
    name = current_context()
    if name == "default":
        return Endpoint(None, "default")
    # The docker CLI stores a context under the sha256 of its name (contexts/meta/<hash>/meta.json).
    digest = hashlib.sha256(name.encode()).hexdigest()
    meta_file = docker_config_dir() / "contexts" / "meta" / digest / "meta.json"
    try:
        meta = json.loads(meta_file.read_text())
        host = meta["Endpoints"]["docker"]["Host"]
    except (OSError, ValueError, KeyError, TypeError) as error:
        raise SandboxUnavailable(
            [(NAME, f"the current Docker context '{name}' cannot be read ({meta_file}: {error})")],
            hint="run 'docker context use default' or set DOCKER_HOST",
        ) from error
    tls_dir = docker_config_dir() / "contexts" / "tls" / digest / "docker"
    return Endpoint(host, f"context {name}", str(tls_dir) if tls_dir.is_dir() else None)


def connect(timeout: int = 60) -> DockerClient:
    """A client of the engine that answers, or SandboxUnavailable saying what to do."""
    _refuse_missing_socket(engine_endpoint())
    try:
        import docker
        from docker.tls import TLSConfig  # type: ignore[import-untyped,unused-ignore]
    except ImportError as error:
        raise SandboxUnavailable(
            [(NAME, "the Docker SDK for Python is not installed")], hint="pip install 'verifier[docker]'"
        ) from error
    endpoint = engine_endpoint()
    where = endpoint.host or "the default socket"
    try:
        if endpoint.host is None:
            client = docker.from_env(timeout=timeout)
        elif endpoint.source == "DOCKER_HOST":
            client = docker.from_env(timeout=timeout)  # also honours DOCKER_TLS_VERIFY / DOCKER_CERT_PATH
        else:
            tls = _context_tls(TLSConfig, endpoint.tls_dir) if endpoint.tls_dir else False
            client = docker.DockerClient(base_url=endpoint.host, tls=tls, timeout=timeout)
        client.ping()
    except docker.errors.DockerException as error:
        raise SandboxUnavailable(
            [(NAME, f"no Docker engine answers at {where} ({endpoint.source}): {_first_line(error)}")],
            hint="start the engine, or point DOCKER_HOST (or a Docker context) at one that runs",
        ) from error
    return client


def _refuse_missing_socket(endpoint: Endpoint) -> None:
    """A unix socket that does not exist answers nothing: say so before paying for the SDK's import."""
    host = endpoint.host or "unix:///var/run/docker.sock"
    if host.startswith("unix://") and not Path(host.removeprefix("unix://")).exists():
        raise SandboxUnavailable(
            [(NAME, f"no Docker engine answers at {host} ({endpoint.source}): the socket does not exist")],
            hint="start the engine, or point DOCKER_HOST (or a Docker context) at one that runs",
        )


def _context_tls(tls_config: Any, folder: str) -> Any:
    files = {name: os.path.join(folder, f"{name}.pem") for name in ("ca", "cert", "key")}
    have = {name: path for name, path in files.items() if os.path.exists(path)}
    client_cert = (have["cert"], have["key"]) if "cert" in have and "key" in have else None
    return tls_config(client_cert=client_cert, ca_cert=have.get("ca"), verify="ca" in have)


def _first_line(error: BaseException) -> str:
    text = str(error).strip() or type(error).__name__
    return text.splitlines()[0][:300]
