"""``verifier sandbox doctor``: for every backend, whether it works here, how much it isolates, and what is missing."""

from __future__ import annotations

from verifier.errors import SandboxUnavailable


def doctor() -> int:
    from verifier.sandbox import BACKENDS, load

    working = 0
    for name in BACKENDS:
        try:
            backend = load(name)
        except SandboxUnavailable as error:
            print(f"{name:<10} unavailable  {error.tried[0][1]}")
            continue
        problem = backend.problem()
        status = "works" if problem is None else "unavailable"
        working += problem is None
        print(f"{name:<10} {status:<12} {backend.isolation if problem is None else problem}")
        for key, value in _facts(name):
            print(f"{'':<10} {key}: {value}")
    return 0 if working else 3


def _facts(name: str) -> list[tuple[str, str]]:
    """Versions and details a backend can tell about itself, for the doctor's listing."""
    if name == "docker":
        try:
            from verifier.sandbox.images import docker_facts

            return docker_facts()
        except Exception as error:  # the doctor reports; it never fails on a missing piece
            return [("facts", f"unavailable: {error}")]
    if name == "namespace":
        import platform
        from pathlib import Path

        limit = Path("/proc/sys/user/max_user_namespaces")
        return [
            ("kernel", platform.release()),
            ("user namespaces allowed", limit.read_text().strip() if limit.exists() else "unknown"),
        ]
    return []
