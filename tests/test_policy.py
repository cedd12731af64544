"""The policy stage: validation with file, line and key; layering; the shipped policies."""

from __future__ import annotations

from pathlib import Path

import pytest

from verifier.errors import PolicyError
from verifier.gitio import Git
from verifier.policy import load_policy, load_policy_file, parse_layer, shipped_dir, shipped_policies
from verifier.scratch import ScratchRepo


def error_of(text: str) -> PolicyError:
    with pytest.raises(PolicyError) as caught:
        parse_layer(text, "verifier.yaml")
    return caught.value


def test_unknown_key_names_file_line_and_key() -> None:
    error = error_of("version: 1\ncoverage:\n  threshold: 80\n  treshold: 70\n")
    assert (error.source, error.line, error.key) == ("verifier.yaml", 4, "coverage.treshold")
    assert str(error).startswith("verifier.yaml:4: key 'coverage.treshold': unknown key")


@pytest.mark.parametrize(
    ("text", "line", "key"),
    [
        ("coverage:\n  threshold: lots\n", 2, "coverage.threshold"),
        ("coverage:\n  threshold: 101\n", 2, "coverage.threshold"),
        ("tests:\n  paths: tests\n", 2, "tests.paths"),
        ("version: 2\n", 1, "version"),
        ("sandbox:\n  allow_process: maybe\n", 2, "sandbox.allow_process"),
        ("rules:\n  tests.failing: loud\n", 2, "rules.tests.failing"),
        ("rules:\n  no.such-rule: warn\n", 2, "rules.no.such-rule"),
        ("extends: lenient\n", 1, "extends"),
        ("limits: 5\n", 1, "limits"),
    ],
)
def test_bad_values_are_located(text: str, line: int, key: str) -> None:
    error = error_of(text)
    assert (error.line, error.key) == (line, key)


def test_broken_yaml_gives_its_line() -> None:
    error = error_of("version: 1\ncoverage: [unclosed\n")
    assert error.line is not None and error.line >= 2 and "not valid YAML" in error.problem


def test_shipped_policies_are_valid() -> None:
    assert {"default", "strict"} <= set(shipped_policies())
    for name in shipped_policies():
        load_policy_file(shipped_dir() / f"{name}.yaml")
    assert load_policy_file(shipped_dir() / "default.yaml").coverage_threshold == 90.0


def test_missing_policy_file_is_a_policy_error(tmp_path: Path) -> None:
    with pytest.raises(PolicyError, match="cannot be read"):
        load_policy_file(tmp_path / "nope.yaml")


def test_layers_read_from_the_base_revision(tmp_path: Path) -> None:
    repo = ScratchRepo(tmp_path / "r")
    base = repo.commit("policy", {"verifier.yaml": "version: 1\nextends: strict\nlimits:\n  memory_mb: 512\n"})
    repo.commit("change the policy", {"verifier.yaml": "version: 1\ncoverage:\n  threshold: 1\n"})
    policy = load_policy(Git(repo.path), base)
    assert policy.coverage_threshold == 100.0  # from strict
    assert policy.limits.memory_mb == 512  # from the repository, at base
    assert policy.limits.wall_seconds == 300  # strict overrides the default's 600
    assert policy.source == f"{base[:12]}:verifier.yaml"
    assert load_policy(Git(repo.path), None).source == "shipped default policy"
