"""``verifier sandbox doctor``: for every backend, whether it works here, how much it isolates, and what is missing."""

from __future__ import annotations

from verifier.errors import SandboxUnavailable


def doctor() -> int:
    """Print one block per registered backend; exit 0 when at least one works here, else 3."""
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
        for key, value in backend.facts():
            print(f"{'':<10} {key}: {value}")
    return 0 if working else 3
