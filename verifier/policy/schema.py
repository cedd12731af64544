"""The policy format: every key a policy file may hold and the check of its value.

A leaf is a :data:`~verifier.policy.checks.Check`; a dict is a section of keys; :class:`Items` is a list
of mappings (waivers); :class:`PathMap` a mapping of path glob to settings (``paths:``); :data:`RULES` marks
a mapping of rule id to its setting and options, which the rule registry validates. :data:`RENAMED_KEYS`
and :data:`RENAMED_VALUES` are the spellings an older policy used: each is refused naming the new one.
Limits have upper bounds as well as lower ones: a policy asking for a year of wall time or a petabyte of
memory is a typo, not a setting.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from verifier.policy import checks

POLICY_FILE = "verifier.yaml"
DAY_SECONDS = 86_400
MEBIBYTES_IN_A_TEBIBYTE = 1_048_576


def shipped_dir() -> Path:
    """Where the shipped policies are: inside the installed wheel, or the source checkout's ``policies/``."""
    package = Path(__file__).resolve().parents[1]
    installed = package / "_policies"
    return installed if installed.is_dir() else package.parent / "policies"


def shipped_policies() -> tuple[str, ...]:
    return tuple(sorted(p.stem for p in shipped_dir().glob("*.yaml")))


def may_change_policy(paths: Iterable[str]) -> bool:
    """True when a change of ``paths`` can change the repository's policy: verifier.yaml, or a YAML file it
    may build on (``builds_on:``). A cheap test on names (no YAML is read), for the commit hook's fast path."""
    return any(path == POLICY_FILE or path.endswith((".yaml", ".yml")) for path in paths)


def is_path(value: str) -> bool:
    """A ``builds_on:`` value naming a file (rather than a shipped policy)."""
    return "/" in value or value.endswith((".yaml", ".yml"))


def _builds_on(value: Any) -> str | None:
    if not isinstance(value, str) or not value.strip():
        return f"expected a shipped policy name or a path, got {checks.shown(value)}"
    if is_path(value) or value in shipped_policies():
        return None
    names = ", ".join(shipped_policies())
    return f"expected the name of a shipped policy ({names}) or a path, got {checks.shown(value)}"


@dataclass(frozen=True)
class Items:
    """A list of mappings, each validated against ``schema``; ``required`` keys must be given."""

    schema: Mapping[str, Any]
    required: tuple[str, ...] = ()


@dataclass(frozen=True)
class PathMap:
    """A mapping of path glob to settings, each validated against ``schema`` (``paths: {"legacy/**": ...}``)."""

    schema: Mapping[str, Any]


class _RuleSection:
    """Marker: a mapping of rule id to a setting, or to ``{severity: ..., <option>: ...}``."""


RULES = _RuleSection()

_PERCENT = checks.number(0, 100)
PATH_SCHEMA: dict[str, Any] = {"coverage": {"threshold": _PERCENT}, "rules": RULES}
WAIVER_SCHEMA: dict[str, Any] = {
    "rule": checks.string,
    "path": checks.text,
    "reason": checks.text,
    "owner": checks.text,
    "expires": checks.expiry,
}

SCHEMA: dict[str, Any] = {
    "version": checks.version,
    "builds_on": _builds_on,
    "coverage": {"threshold": _PERCENT, "exclude": checks.string_list},
    "tests": {"paths": checks.string_list, "args": checks.string_list, "python_path": checks.string_list},
    "limits": {
        "wall_seconds": checks.number(1, DAY_SECONDS),
        "cpu_seconds": checks.number(1, DAY_SECONDS),
        "memory_mb": checks.number(64, MEBIBYTES_IN_A_TEBIBYTE),
        "processes": checks.number(8, 100_000),
        "output_kb": checks.number(1, 1_000_000),
        "file_size_mb": checks.number(1, MEBIBYTES_IN_A_TEBIBYTE),
        "workspace_mb": checks.number(16, MEBIBYTES_IN_A_TEBIBYTE),
        "tmp_mb": checks.number(1, MEBIBYTES_IN_A_TEBIBYTE),
    },
    "sandbox": {"allow_process": checks.boolean},
    "selection": {
        "run": checks.one_of("observed", "all"),
        "differential": checks.boolean,
        "reruns": checks.number(0, 10),
        "allow_flaky": checks.boolean,
        "map_build": checks.one_of("always", "if-cached", "never"),
        "without_map": checks.one_of("all", "imports"),
        "workers": checks.workers,
        "whole_suite_paths": checks.string_list,
        "ignore_paths": checks.string_list,
    },
    "audit": {"agent_identities": checks.string_list},
    "rules": RULES,
    "paths": PathMap(PATH_SCHEMA),
    "waivers": Items(WAIVER_SCHEMA, required=tuple(WAIVER_SCHEMA)),
}

# dotted key an older policy used -> (the new key, how to write it)
RENAMED_KEYS: dict[str, tuple[str, str]] = {
    "extends": ("builds_on", "builds_on: strict"),
    "overrides": ("paths", 'paths: {"legacy/**": {coverage: {threshold: 50}}} (one glob per key)'),
    "selection.mode": ("selection.run", "selection: {run: observed} (or run: all)"),
}
# dotted key -> {old value: new value}
RENAMED_VALUES: dict[str, dict[str, str]] = {"selection.run": {"smart": "observed"}}
