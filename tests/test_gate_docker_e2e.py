"""The gate in Docker gives the same verdict, uncovered lines and failing tests as in the namespace sandbox."""

from __future__ import annotations

import os

import pytest
from conftest import machine, run_check

from verifier.demo import scenario as demo
from verifier.demo.scratch import ScratchRepo


def docker_problem() -> str | None:
    from verifier.sandbox.docker import DockerBackend

    return DockerBackend().problem()


@pytest.fixture(scope="module")
def docker_ready() -> None:
    problem = docker_problem()
    if problem is None:
        return
    if os.environ.get("VERIFIER_REQUIRE_DOCKER") == "1":
        pytest.fail(f"the docker sandbox is required here but does not work: {problem}")
    pytest.skip(f"no usable Docker engine: {problem}")


@pytest.mark.docker
def test_docker_and_namespace_agree(repo: ScratchRepo, docker_ready: None) -> None:
    repo.commit(
        "Start", {"parcelkit/__init__.py": "", "parcelkit/rates.py": demo.RATES, "tests/test_rates.py": demo.TEST_RATES}
    )
    repo.commit(machine("Zones"), {"parcelkit/zones.py": demo.ZONES, "tests/test_zones.py": demo.TEST_ZONES})
    repo.commit(machine("Rounding"), {"parcelkit/rates.py": demo.ROUNDING})
    in_docker = run_check(repo, "HEAD~2..HEAD", sandbox="docker")
    in_namespace = run_check(repo, "HEAD~2..HEAD", sandbox="namespace")
    assert in_docker.report["sandbox"] == "docker", in_docker.stderr
    assert in_namespace.report["sandbox"] == "namespace"
    for key in ("verdict", "machine_lines", "coverage"):
        assert in_docker.report[key] == in_namespace.report[key], key
    assert in_docker.report["tests"] == in_namespace.report["tests"]
    assert in_docker.report["tests"]["failed_ids"] == ["tests/test_rates.py::test_price_of_one_kilo"]
    assert in_docker.report["coverage"]["uncovered"] == {"parcelkit/zones.py": [8, 9, 14]}
    assert in_docker.code == in_namespace.code == 1
