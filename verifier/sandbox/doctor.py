"""``verifier sandbox doctor``: for every backend, whether it works here, how much it isolates, and what is missing;
then which backend ``--sandbox auto`` takes here, and why."""

from __future__ import annotations

from verifier.errors import SandboxUnavailable


def doctor() -> int:
    """Print one block per registered backend and the choice of ``auto``; exit 0 when one works here, else 3."""
    from verifier.sandbox import BACKENDS, load

    working: list[str] = []
    for name in BACKENDS:
        try:
            backend = load(name)
        except SandboxUnavailable as error:
            print(f"{name:<10} unavailable  {error.tried[0][1]}")
            continue
        problem = backend.problem()
        if problem is None:
            working.append(name)
        status = "works" if problem is None else "unavailable"
        print(f"{name:<10} {status:<12} {backend.isolation if problem is None else problem}")
        for key, value in backend.facts():
            print(f"{'':<10} {key}: {value}")
    print(auto_choice(list(BACKENDS), working))
    return 0 if working else 3


def auto_choice(order: list[str], working: list[str]) -> str:
    """What ``--sandbox auto`` does here: the strongest backend that works (``order`` is strongest first);
    ``process`` isolates nothing, so only where the policy allows it."""
    skipped = [name for name in order if name not in working]
    passed_over = f" ({', '.join(skipped)}: unavailable, as said above)" if skipped else ""
    isolating = [name for name in working if name != "process"]
    if isolating:
        return f"--sandbox auto will use {isolating[0]} here: the strongest backend that works{passed_over}"
    if working:
        return (
            f"--sandbox auto will use process here only where the policy allows it (sandbox.allow_process: true): "
            f"it is the only backend that works{passed_over} and it isolates nothing; otherwise checks end "
            "with exit 3 (could not verify)"
        )
    return f"--sandbox auto has no backend to use here{passed_over}: every check ends with exit 3 (could not verify)"
