"""Per-run overhead of the docker sandbox against the namespace sandbox on the same request, and the
container start latency (a trivial command). Prints ratios measured side by side in one run.

Needs a Docker engine (DOCKER_HOST) with the sandbox image, and user namespaces.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

from timing import compare

from verifier.models import Limits, SandboxRequest
from verifier.sandbox.docker import DockerBackend
from verifier.sandbox.namespace import NamespaceBackend

TEST = "def test_sum():\n    assert sum(range(10)) == 45\n"


def request(tree: Path, args: tuple[str, ...]) -> SandboxRequest:
    return SandboxRequest(
        tree=str(tree), python_args=args, env={"LANG": "C.UTF-8"}, limits=Limits(wall_seconds=120), collect=()
    )


def main() -> None:
    docker, namespace = DockerBackend(), NamespaceBackend()
    for backend in (docker, namespace):
        problem = backend.problem()
        if problem:
            raise SystemExit(f"{backend.name} does not work here: {problem}")
    with tempfile.TemporaryDirectory() as folder:
        tree = Path(folder)
        (tree / "test_small.py").write_text(TEST)
        trivial = request(tree, ("-c", "pass"))
        pytest_run = request(tree, ("-m", "pytest", "-q", "-p", "no:cacheprovider", "test_small.py"))
        start = compare(
            "docker: python -c pass",
            lambda: docker.run(trivial),
            "namespace: python -c pass",
            lambda: namespace.run(trivial),
            runs=10,
        )
        small = compare(
            "docker: pytest, one test",
            lambda: docker.run(pytest_run),
            "namespace: pytest, one test",
            lambda: namespace.run(pytest_run),
            runs=10,
        )
    print("start latency (trivial command):", start.describe())
    print("per-run overhead (a small pytest run):", small.describe())


if __name__ == "__main__":
    main()
