"""The sandbox stage: one tiny interface, several backends that differ only in how much they isolate.

A backend takes a :class:`~verifier.models.SandboxRequest` (a materialised tree and a Python command)
and returns a :class:`~verifier.models.SandboxResult` (exit status, capped output, collected files,
resource facts). Backends are imported lazily, so that choosing one costs nothing for the others.

Everything a caller may need from a backend is in :class:`Backend`; steps only one backend has (the
docker backend picking the image built for a repository, its engine facts for the doctor) sit behind
these methods, so no caller tests a backend's name.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Protocol

from verifier.errors import SandboxUnavailable, UsageError
from verifier.models import SandboxRequest, SandboxResult

# Strongest first: ``auto`` takes the first one that works here.
BACKENDS: dict[str, str] = {
    "docker": "verifier.sandbox.docker:DockerBackend",
    "namespace": "verifier.sandbox.namespace:NamespaceBackend",
    "process": "verifier.sandbox.process:ProcessBackend",
}
CHOICES = ("auto", *BACKENDS)


class Backend(Protocol):
    """What every backend provides."""

    @property
    def name(self) -> str:
        """The registry name (``docker``, ``namespace``, ``process``)."""

    @property
    def isolation(self) -> str:
        """One line a report can show: what this backend protects against."""

    def problem(self) -> str | None:
        """None when the backend works here, else why not and what to do."""

    def for_repository(self, repo: str, base: str | None) -> Backend:
        """The backend to use for runs of the repository at ``repo`` whose trusted revision is ``base``
        (the docker backend picks the image built for its test dependencies); often ``self``."""

    def environment(self) -> str:
        """What besides the name makes this backend's runs differ (the image), for content-keyed caches."""

    def facts(self) -> list[tuple[str, str]]:
        """Versions and details for ``verifier sandbox doctor``; never raises."""

    def run(self, request: SandboxRequest) -> SandboxResult:
        """Run ``request`` to the end (or its limits) and clean up everything it started."""


def load(name: str) -> Backend:
    """Instantiate the backend registered under ``name``."""
    if name not in BACKENDS:
        raise UsageError(f"unknown sandbox '{name}'", hint=f"choose one of: {', '.join(CHOICES)}")
    module_name, class_name = BACKENDS[name].split(":")
    try:
        module = importlib.import_module(module_name)
    except ImportError as error:
        raise SandboxUnavailable([(name, f"cannot be loaded: {error}")]) from error
    backend: Backend = getattr(module, class_name)()
    return backend


def choose(requested: str, allow_process: bool) -> Backend:
    """The backend to use: the one requested, or for ``auto`` the strongest that works.

    ``process`` isolates nothing, so ``auto`` takes it only when the policy allows it.
    """
    if requested != "auto":
        backend = load(requested)
        problem = backend.problem()
        if problem:
            raise SandboxUnavailable([(requested, problem)])
        return backend
    tried: list[tuple[str, str]] = []
    for name in BACKENDS:
        if name == "process" and not allow_process:
            tried.append((name, "isolates nothing; use --sandbox process or allow it in the policy"))
            continue
        try:
            backend = load(name)
        except SandboxUnavailable as error:
            tried.extend(error.tried)
            continue
        problem = backend.problem()
        if problem is None:
            return backend
        tried.append((name, problem))
    raise SandboxUnavailable(tried, hint="run 'verifier sandbox doctor' to see what each backend needs")


if TYPE_CHECKING:  # mypy checks here that every registered backend provides the whole interface

    def _every_backend_conforms() -> list[Backend]:
        from verifier.sandbox.docker import DockerBackend
        from verifier.sandbox.namespace import NamespaceBackend
        from verifier.sandbox.process import ProcessBackend

        return [DockerBackend(), NamespaceBackend(), ProcessBackend()]
