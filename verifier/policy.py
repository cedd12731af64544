"""The policy stage: the trusted rules that judge a change, read from the base revision.

Layers, later ones overriding earlier ones key by key: the shipped ``policies/default.yaml``, the
shipped policy named by ``extends:`` (if any), then the repository's ``verifier.yaml`` as it is at the
**base** revision. The change under review never gets a say in how it is judged. Every key is
validated against :data:`SCHEMA`; a broken file or an unknown key is a :class:`PolicyError` naming the
file, line and key.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

from verifier.errors import PolicyError
from verifier.gitio import Git
from verifier.models import Limits, Policy, SelectionSettings

POLICY_FILE = "verifier.yaml"
RULE_SETTINGS = ("block", "warn", "off")


@dataclass(frozen=True)
class Located:
    """A YAML value with the line it came from."""

    value: Any
    line: int


Check = Callable[[Any], str | None]  # returns the problem, or None when the value is fine


def _number(low: float, high: float | None = None) -> Check:
    def check(value: Any) -> str | None:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            return f"expected a number, got {value!r}"
        if value < low or (high is not None and value > high):
            return f"expected a number from {low} to {high}" if high is not None else f"must be at least {low}"
        return None

    return check


def _string_list(value: Any) -> str | None:
    if not isinstance(value, list) or not all(isinstance(item, str) for item in value):
        return f"expected a list of strings, got {value!r}"
    return None


def _boolean(value: Any) -> str | None:
    return None if isinstance(value, bool) else f"expected true or false, got {value!r}"


def _rule_setting(value: Any) -> str | None:
    return None if value in RULE_SETTINGS else f"expected one of {', '.join(RULE_SETTINGS)}, got {value!r}"


def _version(value: Any) -> str | None:
    return None if value == 1 else f"this verifier reads policy version 1, got {value!r}"


def _one_of(value: Any, choices: tuple[str, ...]) -> str | None:
    return None if value in choices else f"expected one of {', '.join(choices)}, got {value!r}"


def _shipped_name(value: Any) -> str | None:
    names = shipped_policies()
    return None if value in names else f"expected the name of a shipped policy ({', '.join(names)}), got {value!r}"


SCHEMA: dict[str, Any] = {
    "version": _version,
    "extends": _shipped_name,
    "coverage": {"threshold": _number(0, 100), "exclude": _string_list},
    "tests": {"paths": _string_list, "args": _string_list, "python_path": _string_list},
    "limits": {
        "wall_seconds": _number(1),
        "cpu_seconds": _number(1),
        "memory_mb": _number(64),
        "processes": _number(8),
        "output_kb": _number(1),
        "file_size_mb": _number(1),
        "workspace_mb": _number(16),
        "tmp_mb": _number(1),
    },
    "sandbox": {"allow_process": _boolean},
    "selection": {
        "mode": lambda value: _one_of(value, ("smart", "all")),
        "differential": _boolean,
        "reruns": _number(0, 10),
        "map_build": lambda value: _one_of(value, ("always", "if-cached", "never")),
        "without_map": lambda value: _one_of(value, ("all", "imports")),
        "workers": lambda value: None if value == "auto" else _number(1, 256)(value),
        "whole_suite_paths": _string_list,
        "ignore_paths": _string_list,
    },
    "rules": _rule_setting,  # a mapping of rule id -> setting; ids are checked against the registry
}


def shipped_dir() -> Path:
    """Where the shipped policies are: inside the installed wheel, or the source checkout's ``policies/``."""
    here = Path(__file__).resolve().parent
    installed = here / "_policies"
    return installed if installed.is_dir() else here.parent / "policies"


def shipped_policies() -> tuple[str, ...]:
    return tuple(sorted(p.stem for p in shipped_dir().glob("*.yaml")))


def load_policy(git: Git, base: str | None) -> Policy:
    """The effective policy for a change whose trusted base revision is ``base``."""
    layers = [_read_layer(shipped_dir() / "default.yaml")]
    repo_layer = None
    if base is not None:
        text = git.show_file(base, POLICY_FILE)
        if text is not None:
            repo_layer = parse_layer(text.decode("utf-8", "replace"), f"{base[:12]}:{POLICY_FILE}")
    extends = (repo_layer or {}).get("extends")
    if extends is not None and extends.value != "default":
        layers.append(_read_layer(shipped_dir() / f"{extends.value}.yaml"))
    if repo_layer is not None:
        layers.append(repo_layer)
    source = f"{base[:12]}:{POLICY_FILE}" if repo_layer is not None else "shipped default policy"
    return build_policy(merge_layers(layers), source)


def load_policy_file(path: Path) -> Policy:
    """Validate a policy file on disk (for ``verifier policy check``) and return it merged with the default."""
    layer = _read_layer(path)
    return build_policy(merge_layers([_read_layer(shipped_dir() / "default.yaml"), layer]), str(path))


def _read_layer(path: Path) -> dict[str, Any]:
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as error:
        raise PolicyError(str(path), None, None, f"cannot be read: {error.strerror}") from error
    return parse_layer(text, str(path))


def parse_layer(text: str, source: str) -> dict[str, Any]:
    """Parse and validate one policy file; values come back wrapped in :class:`Located`."""
    try:
        node = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.YAMLError as error:
        mark = getattr(error, "problem_mark", None)
        problem = getattr(error, "problem", None) or str(error)
        raise PolicyError(source, mark.line + 1 if mark else None, None, f"not valid YAML: {problem}") from error
    if node is None:
        return {}
    if not isinstance(node, yaml.MappingNode):
        raise PolicyError(source, node.start_mark.line + 1, None, "the policy must be a mapping of keys")
    return _validate_mapping(node, SCHEMA, source, prefix="")


def _validate_mapping(node: yaml.MappingNode, schema: Any, source: str, prefix: str) -> dict[str, Any]:
    result: dict[str, Any] = {}
    for key_node, value_node in node.value:
        key = str(key_node.value)
        dotted = f"{prefix}{key}"
        line = key_node.start_mark.line + 1
        expected = schema if callable(schema) else schema.get(key) if isinstance(schema, dict) else None
        if expected is None:
            known = ", ".join(schema) if isinstance(schema, dict) else ""
            raise PolicyError(source, line, dotted, f"unknown key (known here: {known})")
        if dotted in result:
            raise PolicyError(source, line, dotted, "given twice")
        result[key] = _validate_value(value_node, expected, source, dotted, line)
    return result


def _validate_value(node: yaml.Node, expected: Any, source: str, dotted: str, line: int) -> Any:
    if isinstance(expected, dict):
        if not isinstance(node, yaml.MappingNode):
            raise PolicyError(source, line, dotted, "expected a mapping of keys")
        return _validate_mapping(node, expected, source, prefix=f"{dotted}.")
    if dotted == "rules":
        if not isinstance(node, yaml.MappingNode):
            raise PolicyError(source, line, dotted, "expected a mapping of rule id to block, warn or off")
        return _validate_rules(node, source)
    value = yaml.SafeLoader("").construct_document(node)
    problem = expected(value)
    if problem:
        raise PolicyError(source, line, dotted, problem)
    return Located(value, line)


def _validate_rules(node: yaml.MappingNode, source: str) -> dict[str, Any]:
    from verifier.rules import load_all

    registry = load_all()
    settings: dict[str, Any] = {}
    for key_node, value_node in node.value:
        rule_id, line = str(key_node.value), key_node.start_mark.line + 1
        if rule_id not in registry:
            raise PolicyError(source, line, f"rules.{rule_id}", "no such rule (see 'verifier rules')")
        problem = _rule_setting(value_node.value)
        if problem:
            raise PolicyError(source, line, f"rules.{rule_id}", problem)
        settings[rule_id] = Located(value_node.value, line)
    return settings


def merge_layers(layers: list[Mapping[str, Any]]) -> dict[str, Any]:
    """Deep-merge validated layers, later ones winning key by key."""
    merged: dict[str, Any] = {}
    for layer in layers:
        for key, value in layer.items():
            if isinstance(value, dict) and isinstance(merged.get(key), dict):
                merged[key] = merge_layers([merged[key], value])
            else:
                merged[key] = value
    return merged


def build_policy(merged: Mapping[str, Any], source: str) -> Policy:
    """Turn a merged, validated layer into the typed :class:`Policy`."""

    def get(section: str, key: str) -> Any:
        return merged[section][key].value

    limits = merged["limits"]
    return Policy(
        source=source,
        coverage_threshold=float(get("coverage", "threshold")),
        coverage_exclude=tuple(get("coverage", "exclude")),
        test_paths=tuple(get("tests", "paths")),
        pytest_args=tuple(get("tests", "args")),
        python_path=tuple(get("tests", "python_path")),
        limits=Limits(
            wall_seconds=float(limits["wall_seconds"].value),
            cpu_seconds=int(limits["cpu_seconds"].value),
            memory_mb=int(limits["memory_mb"].value),
            processes=int(limits["processes"].value),
            output_bytes=int(limits["output_kb"].value) * 1000,
            file_size_mb=int(limits["file_size_mb"].value),
            workspace_mb=int(limits["workspace_mb"].value),
            tmp_mb=int(limits["tmp_mb"].value),
        ),
        allow_process_sandbox=bool(get("sandbox", "allow_process")),
        rules={rule: located.value for rule, located in merged.get("rules", {}).items()},
        selection=_selection(merged.get("selection", {})),
    )


def _selection(section: Mapping[str, Any]) -> SelectionSettings:
    """The ``selection:`` section; a key no layer gives keeps the data model's default."""
    values = {key: located.value for key, located in section.items() if not key.startswith("_")}
    if values.get("workers") == "auto":
        values["workers"] = 0
    for key in ("reruns", "workers"):
        if key in values:
            values[key] = int(values[key])
    for key in ("whole_suite_paths", "ignore_paths"):
        if key in values:
            values[key] = tuple(values[key])
    return SelectionSettings(**values)
