"""The policy stage: the trusted rules that judge a change, layered, validated, with overrides and waivers.

Layers, later ones overriding earlier ones key by key: the shipped ``policies/default.yaml``; an optional
organisation policy (``--org-policy PATH`` or ``$VERIFIER_ORG_POLICY``); then the repository's
``verifier.yaml`` as it is at the **base** revision. A layer may ``extends:`` a shipped policy by name or
another file by path; the extended file sits just below the layer that names it. ``overrides`` and
``waivers`` lists are joined across layers, in order. The change under review never gets a say in how it
is judged: its own ``verifier.yaml`` (waivers included) is not read.

Every key is validated against :data:`SCHEMA`; a broken file, an unknown key or a wrongly typed value is
a :class:`PolicyError` naming the file, line, column and key. Every value keeps where it came from, so
``verifier policy show`` can print the effective policy with the origin of each value.
"""

from __future__ import annotations

import difflib
import os
import posixpath
import re
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field, replace
from datetime import date, datetime, timezone
from pathlib import Path
from typing import Any

import yaml

from verifier.errors import PolicyError
from verifier.gitio import Git
from verifier.models import Finding, Limits, PathOverride, Policy, RuleSetting, SelectionSettings, Waiver

POLICY_FILE = "verifier.yaml"
ORG_POLICY_ENV = "VERIFIER_ORG_POLICY"
RULE_SETTINGS = ("block", "warn", "off")
JOINED_KEYS = ("overrides", "waivers")  # lists that later layers extend instead of replacing
MAX_EXTENDS_DEPTH = 8


@dataclass(frozen=True)
class Located:
    """A validated YAML value with the file, line and column it came from."""

    value: Any
    line: int
    source: str = ""
    column: int = 0

    @property
    def where(self) -> str:
        return f"{self.source}:{self.line}"


@dataclass(frozen=True)
class Layer:
    """One validated policy file: its label (``shipped:strict.yaml``, ``<sha>:verifier.yaml``, a path)."""

    label: str
    data: Mapping[str, Any]


Check = Callable[[Any], str | None]  # returns the problem, or None when the value is fine


# --- scalar checks ------------------------------------------------------------------------------------


def _number(low: float, high: float | None = None) -> Check:
    def check(value: Any) -> str | None:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            return f"expected a number, got {value!r}"
        if value < low or (high is not None and value > high):
            return f"expected a number from {low} to {high}" if high is not None else f"must be at least {low}"
        return None

    return check


def _integer(value: Any) -> str | None:
    return None if isinstance(value, int) and not isinstance(value, bool) else f"expected a whole number, got {value!r}"


def _any_number(value: Any) -> str | None:
    return _number(float("-inf"))(value)


def _string(value: Any) -> str | None:
    return None if isinstance(value, str) else f"expected a string, got {value!r}"


def _text(value: Any) -> str | None:
    return None if isinstance(value, str) and value.strip() else f"expected a non-empty string, got {value!r}"


def _string_list(value: Any) -> str | None:
    if not isinstance(value, list) or not all(isinstance(item, str) for item in value):
        return f"expected a list of strings, got {value!r}"
    return None


def _glob_list(value: Any) -> str | None:
    problem = _string_list(value)
    return problem or (None if value else "expected at least one path glob")


def _boolean(value: Any) -> str | None:
    return None if isinstance(value, bool) else f"expected true or false, got {value!r}"


def _rule_setting(value: Any) -> str | None:
    return None if value in RULE_SETTINGS else f"expected one of {', '.join(RULE_SETTINGS)}, got {value!r}"


def _version(value: Any) -> str | None:
    return None if value == 1 else f"this verifier reads policy version 1, got {value!r}"


def _extends(value: Any) -> str | None:
    if not isinstance(value, str) or not value.strip():
        return f"expected a shipped policy name or a path, got {value!r}"
    if _is_path(value) or value in shipped_policies():
        return None
    return f"expected the name of a shipped policy ({', '.join(shipped_policies())}) or a path, got {value!r}"


_DATE = re.compile(r"\d{4}-\d{2}-\d{2}")


def _expiry(value: Any) -> str | None:
    if isinstance(value, date) and not isinstance(value, datetime):
        return None
    if isinstance(value, str) and _DATE.fullmatch(value):
        try:
            date.fromisoformat(value)
            return None
        except ValueError:
            pass
    return f"expected a date written YYYY-MM-DD, got {value!r}"


def _one_of(value: Any, choices: tuple[str, ...]) -> str | None:
    return None if value in choices else f"expected one of {', '.join(choices)}, got {value!r}"


def _is_path(value: str) -> bool:
    return "/" in value or value.endswith((".yaml", ".yml"))


# --- the schema ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Items:
    """A list of mappings, each validated against ``schema``; ``required`` keys must be given."""

    schema: Mapping[str, Any]
    required: tuple[str, ...] = ()


class _RuleSection:
    """Marker: a mapping of rule id to a setting, or to ``{severity: ..., <option>: ...}``."""


RULES = _RuleSection()

OVERRIDE_SCHEMA: dict[str, Any] = {"paths": _glob_list, "coverage": {"threshold": _number(0, 100)}, "rules": RULES}
WAIVER_SCHEMA: dict[str, Any] = {"rule": _string, "path": _text, "reason": _text, "owner": _text, "expires": _expiry}

SCHEMA: dict[str, Any] = {
    "version": _version,
    "extends": _extends,
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
        "allow_flaky": _boolean,
        "map_build": lambda value: _one_of(value, ("always", "if-cached", "never")),
        "without_map": lambda value: _one_of(value, ("all", "imports")),
        "workers": lambda value: None if value == "auto" else _number(1, 256)(value),
        "whole_suite_paths": _string_list,
        "ignore_paths": _string_list,
    },
    "audit": {"agent_identities": _string_list},
    "rules": RULES,
    "overrides": Items(OVERRIDE_SCHEMA, required=("paths",)),
    "waivers": Items(WAIVER_SCHEMA, required=tuple(WAIVER_SCHEMA)),
}


# --- shipped policies ---------------------------------------------------------------------------------


def shipped_dir() -> Path:
    """Where the shipped policies are: inside the installed wheel, or the source checkout's ``policies/``."""
    package = Path(__file__).resolve().parents[1]
    installed = package / "_policies"
    return installed if installed.is_dir() else package.parent / "policies"


def shipped_policies() -> tuple[str, ...]:
    return tuple(sorted(p.stem for p in shipped_dir().glob("*.yaml")))


def shipped_layer(name: str) -> Layer:
    label = f"shipped:{name}.yaml"
    path = shipped_dir() / f"{name}.yaml"
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as error:
        raise PolicyError(label, None, None, f"cannot be read: {error.strerror}") from error
    return Layer(label, parse_layer(text, label))


# --- loading ------------------------------------------------------------------------------------------


def org_policy_path(explicit: str | os.PathLike[str] | None = None) -> Path | None:
    """The organisation policy: the command line's path, else ``$VERIFIER_ORG_POLICY``, else none."""
    chosen = explicit if explicit not in (None, "") else os.environ.get(ORG_POLICY_ENV) or None
    return None if chosen is None else Path(chosen)


def load_policy(
    git: Git, base: str | None, org_policy: str | os.PathLike[str] | None = None, today: date | None = None
) -> Policy:
    """The effective policy for a change whose trusted base revision is ``base``."""
    return build_policy(policy_layers(git, base, org_policy), today)


def policy_layers(git: Git, base: str | None, org_policy: str | os.PathLike[str] | None = None) -> list[Layer]:
    """The layers, lowest first: shipped default, organisation policy, the repository's file at ``base``."""
    layers = [shipped_layer("default"), *_org_layers(org_policy)]
    if base is not None:
        text = git.show_file(base, POLICY_FILE)
        if text is not None:
            label = f"{base[:12]}:{POLICY_FILE}"
            layer = Layer(label, parse_layer(text.decode("utf-8", "replace"), label))
            layers += _with_extends(layer, _revision_reader(git, base))
    return _first_of_each(layers)


def file_layers(path: Path, root: Path, org_policy: str | os.PathLike[str] | None = None) -> list[Layer]:
    """The layers for a policy file on disk (``verifier policy check``); its ``extends:`` paths are
    relative to ``root`` (the repository's folder), as they would be at a base revision."""
    return _first_of_each(
        [shipped_layer("default"), *_org_layers(org_policy), *_with_extends(read_file_layer(path), _disk_reader(root))]
    )


def load_policy_file(
    path: Path, root: Path | None = None, org_policy: str | None = None, today: date | None = None
) -> Policy:
    """Validate a policy file on disk and return it merged with the layers below it."""
    return build_policy(file_layers(path, root or path.parent, org_policy), today)


def _org_layers(org_policy: str | os.PathLike[str] | None) -> list[Layer]:
    path = org_policy_path(org_policy)
    if path is None:
        return []
    return _with_extends(read_file_layer(path), _disk_reader(path.parent))


def read_file_layer(path: Path) -> Layer:
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as error:
        raise PolicyError(str(path), None, None, f"cannot be read: {error.strerror}") from error
    return Layer(str(path), parse_layer(text, str(path)))


Reader = Callable[[str, Located], Layer]  # (relative path, the extends value) -> the layer it names


def _revision_reader(git: Git, base: str) -> Reader:
    def read(path: str, where: Located) -> Layer:
        clean = _relative(path, where)
        label = f"{base[:12]}:{clean}"
        text = git.show_file(base, clean)
        if text is None:
            raise _error_at(where, "extends", f"no file '{clean}' at the base revision {base[:12]}")
        return Layer(label, parse_layer(text.decode("utf-8", "replace"), label))

    return read


def _disk_reader(root: Path) -> Reader:
    def read(path: str, where: Located) -> Layer:
        target = root / _relative(path, where)
        if not target.is_file():
            raise _error_at(where, "extends", f"no file '{target}'")
        return read_file_layer(target)

    return read


def _relative(path: str, where: Located) -> str:
    clean = posixpath.normpath(path)
    if clean.startswith(("/", "../")) or clean == "..":
        raise _error_at(where, "extends", f"'{path}' must be a path inside the repository")
    return clean


def _with_extends(layer: Layer, read: Reader, depth: int = 0) -> list[Layer]:
    """``layer`` preceded by the chain of files it extends (each below the one that names it)."""
    extends = layer.data.get("extends")
    if extends is None or extends.value == "default":
        return [layer]
    if depth >= MAX_EXTENDS_DEPTH:
        raise _error_at(extends, "extends", f"more than {MAX_EXTENDS_DEPTH} policies extend one another (a cycle?)")
    parent = read(extends.value, extends) if _is_path(extends.value) else shipped_layer(extends.value)
    if parent.label == layer.label:
        raise _error_at(extends, "extends", "a policy cannot extend itself")
    return [*_with_extends(parent, read, depth + 1), layer]


def _first_of_each(layers: list[Layer]) -> list[Layer]:
    """Drop repeated layers: extending a policy already in the stack adds nothing (and undoes nothing)."""
    seen: set[str] = set()
    unique = []
    for layer in layers:
        if layer.label not in seen:
            seen.add(layer.label)
            unique.append(layer)
    return unique


def _error_at(where: Located, key: str, problem: str) -> PolicyError:
    return PolicyError(where.source, where.line, key, problem, column=where.column or None)


# --- parsing and validation ---------------------------------------------------------------------------


def parse_layer(text: str, source: str) -> dict[str, Any]:
    """Parse and validate one policy file; values come back wrapped in :class:`Located`."""
    try:
        node = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.YAMLError as error:
        mark = getattr(error, "problem_mark", None)
        problem = getattr(error, "problem", None) or str(error)
        raise PolicyError(
            source,
            mark.line + 1 if mark else None,
            None,
            f"not valid YAML: {problem}",
            column=mark.column + 1 if mark else None,
        ) from error
    if node is None:
        return {}
    if not isinstance(node, yaml.MappingNode):
        raise _node_error(source, node, None, "the policy must be a mapping of keys")
    return _mapping(node, SCHEMA, source, prefix="")


def _node_error(source: str, node: yaml.Node, key: str | None, problem: str) -> PolicyError:
    return PolicyError(source, node.start_mark.line + 1, key, problem, column=node.start_mark.column + 1)


def _locate(value: Any, node: yaml.Node, source: str) -> Located:
    return Located(value, node.start_mark.line + 1, source, node.start_mark.column + 1)


def _mapping(node: yaml.MappingNode, schema: Mapping[str, Any], source: str, prefix: str) -> dict[str, Any]:
    result: dict[str, Any] = {}
    for key_node, value_node in node.value:
        key = str(key_node.value)
        dotted = f"{prefix}{key}"
        expected = schema.get(key)
        if expected is None:
            raise _node_error(source, key_node, dotted, _unknown(key, schema))
        if key in result:
            raise _node_error(source, key_node, dotted, "given twice")
        result[key] = _value(value_node, expected, source, dotted)
    return result


def _unknown(key: str, known: Iterable[str]) -> str:
    names = sorted(known)
    close = difflib.get_close_matches(key, names, n=1)
    hint = f"; did you mean '{close[0]}'?" if close else ""
    return f"unknown key (known here: {', '.join(names)}){hint}"


def _value(node: yaml.Node, expected: Any, source: str, dotted: str) -> Any:
    if isinstance(expected, dict):
        if not isinstance(node, yaml.MappingNode):
            raise _node_error(source, node, dotted, "expected a mapping of keys")
        return _mapping(node, expected, source, prefix=f"{dotted}.")
    if isinstance(expected, _RuleSection):
        return _rules(node, source, dotted)
    if isinstance(expected, Items):
        return _items(node, expected, source, dotted)
    value = _construct(node, source, dotted)
    problem = expected(value)
    if problem:
        raise _node_error(source, node, dotted, problem)
    return _locate(value, node, source)


def _construct(node: yaml.Node, source: str, dotted: str) -> Any:
    try:
        return yaml.SafeLoader("").construct_document(node)
    except (yaml.YAMLError, ValueError) as error:  # e.g. a date like 2026-13-01
        raise _node_error(source, node, dotted, f"not a valid value: {error}") from error


def _items(node: yaml.Node, items: Items, source: str, dotted: str) -> list[dict[str, Any]]:
    if not isinstance(node, yaml.SequenceNode):
        raise _node_error(source, node, dotted, "expected a list of mappings (each entry starting with '- ')")
    result = []
    for index, item in enumerate(node.value):
        where = f"{dotted}[{index}]"
        if not isinstance(item, yaml.MappingNode):
            raise _node_error(source, item, where, "expected a mapping of keys")
        entry = _mapping(item, items.schema, source, prefix=f"{where}.")
        missing = [key for key in items.required if key not in entry]
        if missing:
            raise _node_error(source, item, where, f"missing {', '.join(missing)}")
        entry["_at"] = _locate(index, item, source)
        result.append(entry)
    if dotted == "waivers":
        for index, entry in enumerate(result):
            _check_waiver_rule(entry, f"waivers[{index}].rule")
    return result


def _check_waiver_rule(entry: Mapping[str, Any], key: str) -> None:
    from verifier.rules import load_all

    rule_id = entry["rule"]
    registered = load_all().get(rule_id.value)
    if registered is None:
        raise _error_at(rule_id, key, f"no rule '{rule_id.value}' (see 'verifier policy rules')")
    if registered.fixed:
        raise _error_at(rule_id, key, "this rule is how the gate fails closed; it cannot be waived")


def _rules(node: yaml.Node, source: str, dotted: str) -> dict[str, Any]:
    from verifier.rules import load_all

    if not isinstance(node, yaml.MappingNode):
        raise _node_error(source, node, dotted, "expected a mapping of rule id to block, warn or off")
    registry = load_all()
    settings: dict[str, Any] = {}
    for key_node, value_node in node.value:
        rule_id = str(key_node.value)
        key = f"{dotted}.{rule_id}"
        registered = registry.get(rule_id)
        if registered is None:
            raise _node_error(source, key_node, key, _unknown(rule_id, registry).replace("key", "rule", 1))
        if rule_id in settings:
            raise _node_error(source, key_node, key, "given twice")
        if isinstance(value_node, yaml.MappingNode):
            section = _rule_mapping(value_node, registered, source, key)
        else:
            section = {"severity": _severity(value_node, registered, source, key)}
        settings[rule_id] = section
    return settings


def _severity(node: yaml.Node, registered: Any, source: str, key: str) -> Located:
    # the raw text: YAML 1.1 would read a bare ``off`` as false
    value = node.value if isinstance(node, yaml.ScalarNode) else None
    problem = _rule_setting(value)
    if problem:
        raise _node_error(source, node, key, problem)
    if registered.fixed and value != "block":
        raise _node_error(source, node, key, "this rule is how the gate fails closed; it always blocks")
    return _locate(value, node, source)


def _rule_mapping(node: yaml.MappingNode, registered: Any, source: str, key: str) -> dict[str, Any]:
    section: dict[str, Any] = {"options": {}}
    for name_node, value_node in node.value:
        name = str(name_node.value)
        if name == "severity":
            section["severity"] = _severity(value_node, registered, source, f"{key}.severity")
            continue
        if name not in registered.options:
            raise _node_error(
                source,
                name_node,
                f"{key}.{name}",
                _unknown(name, ["severity", *registered.options]).replace("key", "option", 1),
            )
        if name in section["options"]:
            raise _node_error(source, name_node, f"{key}.{name}", "given twice")
        value = _construct(value_node, source, f"{key}.{name}")
        default = registered.options[name]
        problem = option_check(default)(value)
        if problem:
            raise _node_error(source, value_node, f"{key}.{name}", problem)
        _check_items(registered.id, name, value, value_node, source, f"{key}.{name}")
        section["options"][name] = _locate(_like(default, value), value_node, source)
    return section


# Options whose entries their rule validates itself: (rule id, option) -> (module, function(entry) -> problems).
ITEM_CHECKS = {("calls.banned", "entries"): ("verifier.rules.calls", "entry_problems")}


def _check_items(rule_id: str, name: str, value: Any, node: yaml.Node, source: str, key: str) -> None:
    """Let the rule judge each entry of a list option, so a bad entry is located here, at its line."""
    import importlib

    module_name, function_name = ITEM_CHECKS.get((rule_id, name), ("", ""))
    if not module_name or not isinstance(node, yaml.SequenceNode):
        return
    try:
        problems_of = getattr(importlib.import_module(module_name), function_name)
    except (ImportError, AttributeError):  # the rule validates its entries when it runs, too
        return
    for index, (item, item_node) in enumerate(zip(value, node.value, strict=True)):
        problems = problems_of(item)
        if problems:
            raise _node_error(source, item_node, f"{key}[{index}]", "; ".join(problems))


def option_check(default: Any) -> Check:
    """The check of a rule option, from the type of its default (bool, int, float, str, list, mapping)."""
    if isinstance(default, bool):
        return _boolean
    if isinstance(default, int):
        return _integer
    if isinstance(default, float):
        return _any_number
    if isinstance(default, str):
        return _string
    if isinstance(default, (list, tuple)):
        return _list_like(default)
    if isinstance(default, Mapping):
        return _plain_mapping
    return lambda _value: None


def _list_like(default: list[Any] | tuple[Any, ...]) -> Check:
    def check(value: Any) -> str | None:
        if not isinstance(value, list):
            return f"expected a list, got {value!r}"
        if all(isinstance(item, str) for item in value) and not any(isinstance(d, Mapping) for d in default):
            return None
        if all(isinstance(item, Mapping) for item in value) and not any(isinstance(d, str) for d in default):
            problems = [p for item in value if (p := _plain_mapping(item))]
            return problems[0] if problems else None
        kind = "mappings" if any(isinstance(d, Mapping) for d in default) else "strings"
        return f"expected a list of {kind}, got {value!r}"

    return check


def _plain_mapping(value: Any) -> str | None:
    """Light validation of a mapping option (e.g. a banned-call entry): string keys, plain values."""
    if not isinstance(value, Mapping) or not all(isinstance(k, str) for k in value):
        return f"expected a mapping with string keys, got {value!r}"
    bad = [item for item in value.values() if not _is_plain(item)]
    return f"expected plain values (strings, numbers, lists, mappings), got {bad[0]!r}" if bad else None


def _is_plain(value: Any) -> bool:
    if isinstance(value, list):
        return all(_is_plain(item) for item in value)
    if isinstance(value, Mapping):
        return all(isinstance(k, str) and _is_plain(v) for k, v in value.items())
    return value is None or isinstance(value, (str, int, float, bool))


def _like(default: Any, value: Any) -> Any:
    """The policy's value in the shape of the default (a tuple stays a tuple, an int for a float is a float)."""
    if isinstance(default, tuple) and isinstance(value, list):
        return tuple(value)
    if isinstance(default, float) and isinstance(value, int):
        return float(value)
    return value


# --- merging and building -----------------------------------------------------------------------------


def merge_layers(layers: Iterable[Mapping[str, Any]], top: bool = True) -> dict[str, Any]:
    """Deep-merge validated layers, later ones winning key by key; ``overrides`` and ``waivers`` join."""
    merged: dict[str, Any] = {}
    for layer in layers:
        for key, value in layer.items():
            if top and key in JOINED_KEYS:
                merged[key] = [*merged.get(key, []), *value]
            elif isinstance(value, dict) and isinstance(merged.get(key), dict):
                merged[key] = merge_layers([merged[key], value], top=False)
            else:
                merged[key] = value
    return merged


def describe_source(layers: list[Layer]) -> str:
    """A one-line name for the policy: the layers above the shipped default, else the default itself."""
    above = [layer.label for layer in layers[1:]]
    return " + ".join(above) if above else "shipped default policy"


def build_policy(layers: list[Layer], today: date | None = None) -> Policy:
    """Merge the layers into the typed :class:`Policy`; an expired waiver is a :class:`PolicyError`."""
    merged = merge_layers(layer.data for layer in layers)

    def get(section: str, key: str) -> Any:
        return merged[section][key].value

    limits = merged["limits"]
    rules, options = _rule_values(merged.get("rules", {}))
    waivers = tuple(_waiver(entry) for entry in merged.get("waivers", []))
    _refuse_expired(waivers, merged.get("waivers", []), today or datetime.now(timezone.utc).date())
    return Policy(
        source=describe_source(layers),
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
        rules=rules,
        rule_options=options,
        overrides=tuple(_override(entry) for entry in merged.get("overrides", [])),
        waivers=waivers,
        selection=_selection(merged.get("selection", {})),
        agent_identities=tuple(getattr(merged.get("audit", {}).get("agent_identities"), "value", ())),
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


def _rule_values(sections: Mapping[str, Any]) -> tuple[dict[str, RuleSetting], dict[str, dict[str, Any]]]:
    settings = {rule: s["severity"].value for rule, s in sections.items() if "severity" in s}
    options = {rule: {k: v.value for k, v in s["options"].items()} for rule, s in sections.items() if s.get("options")}
    return settings, options


def _override(entry: Mapping[str, Any]) -> PathOverride:
    rules, options = _rule_values(entry.get("rules", {}))
    threshold = entry.get("coverage", {}).get("threshold")
    return PathOverride(
        paths=tuple(entry["paths"].value),
        source=entry["_at"].where,
        coverage_threshold=None if threshold is None else float(threshold.value),
        rules=rules,
        rule_options=options,
    )


def _waiver(entry: Mapping[str, Any]) -> Waiver:
    expires = entry["expires"].value
    return Waiver(
        rule=entry["rule"].value,
        path=entry["path"].value.strip(),
        reason=entry["reason"].value.strip(),
        owner=entry["owner"].value.strip(),
        expires=expires.isoformat() if isinstance(expires, date) else expires,
        source=entry["_at"].where,
    )


def _refuse_expired(waivers: tuple[Waiver, ...], entries: list[Mapping[str, Any]], today: date) -> None:
    """A waiver is valid through its expiry date; after it, the policy is broken until someone renews
    or removes the waiver (a silent lapse would either keep blocking for no stated reason or, worse,
    tempt people to drop the gate)."""
    for waiver, entry in zip(waivers, entries, strict=True):
        if date.fromisoformat(waiver.expires) < today:
            raise _error_at(
                entry["expires"],
                f"waivers[{entry['_at'].value}].expires",
                f"the waiver of {waiver.rule} for '{waiver.path}' (owner {waiver.owner}) expired on "
                f"{waiver.expires}; renew it with a later date or remove it",
            )


# --- applying the policy to a path or a finding -------------------------------------------------------


@dataclass(frozen=True)
class PathSettings:
    """The policy as it applies to one path, after the per-path overrides that match it."""

    coverage_threshold: float
    rules: Mapping[str, RuleSetting] = field(default_factory=dict)
    rule_options: Mapping[str, Mapping[str, Any]] = field(default_factory=dict)
    overrides: tuple[str, ...] = ()  # where the overrides that apply are written

    def setting(self, rule_id: str, default: RuleSetting) -> RuleSetting:
        return self.rules.get(rule_id, default)

    def option(self, rule_id: str, name: str, default: Any) -> Any:
        return self.rule_options.get(rule_id, {}).get(name, default)


def policy_for_path(policy: Policy, path: str | None) -> PathSettings:
    """The effective settings for ``path``; a change-wide finding (``None``) gets the policy's own."""
    from verifier.pathglob import matches_any

    threshold = policy.coverage_threshold
    rules = dict(policy.rules)
    options = {rule: dict(values) for rule, values in policy.rule_options.items()}
    applied = []
    for override in policy.overrides if path is not None else ():
        if not matches_any(path, override.paths):
            continue
        applied.append(override.source)
        threshold = threshold if override.coverage_threshold is None else override.coverage_threshold
        rules.update(override.rules)
        for rule, values in override.rule_options.items():
            options.setdefault(rule, {}).update(values)
    return PathSettings(threshold, rules, options, tuple(applied))


def enabled_anywhere(policy: Policy, rule_id: str, default: RuleSetting) -> bool:
    """False only when the rule is off for the policy and for every override (so it need not run)."""
    settings = [policy.setting(rule_id, default), *(o.rules[rule_id] for o in policy.overrides if rule_id in o.rules)]
    return any(setting != "off" for setting in settings)


def waiver_for(policy: Policy, finding: Finding) -> Waiver | None:
    """The first waiver that covers ``finding``; only the glob ``**`` covers a finding without a path."""
    from verifier.pathglob import matches_any

    for waiver in policy.waivers:
        if waiver.rule != finding.rule:
            continue
        if finding.path is None and waiver.path == "**":
            return waiver
        if finding.path is not None and matches_any(finding.path, (waiver.path,)):
            return waiver
    return None


def judge_finding(policy: Policy, rule_id: str, default: RuleSetting, fixed: bool, finding: Finding) -> Finding | None:
    """The finding with the severity the policy gives it at its path: None when the rule is off there,
    ``info`` with ``details["waived_by"]`` when a waiver covers it. Errors and info pass unchanged."""
    if finding.severity in ("error", "info"):
        return finding
    setting = "block" if fixed else policy_for_path(policy, finding.path).setting(rule_id, default)
    if setting == "off":
        return None
    waiver = None if fixed else waiver_for(policy, finding)
    if waiver is None:
        return replace(finding, severity=setting)
    details = {**finding.details, "waived_by": waiver_record(waiver), "waived_severity": setting}
    return replace(finding, severity="info", details=details)


def waiver_record(waiver: Waiver) -> dict[str, str]:
    return {
        "rule": waiver.rule,
        "path": waiver.path,
        "reason": waiver.reason,
        "owner": waiver.owner,
        "expires": waiver.expires,
        "source": waiver.source,
    }


def waivers_used(policy: Policy, findings: Iterable[Finding]) -> tuple[Waiver, ...]:
    """The policy's waivers that covered at least one of ``findings``, in the policy's order."""
    used = {waiver.get("source") for f in findings if isinstance(waiver := f.details.get("waived_by"), Mapping)}
    return tuple(waiver for waiver in policy.waivers if waiver.source in used)
