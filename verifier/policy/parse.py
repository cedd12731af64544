"""Parsing and validating one policy file: YAML nodes checked against the schema, each value located.

Values come back wrapped in :class:`Located` (file, line, column), so that every later message, and
``verifier policy show``, can say where a value was written. Rule ids, settings and options are checked
against the rule registry. A key or value an older policy spelled otherwise (``extends``, ``overrides``,
``selection.mode``, ``warn``, ``off``) is refused with the new spelling. A file whose aliases expand past
:data:`MAX_EXPANDED_NODES` values is refused before any value is built.
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import yaml

from verifier.errors import PolicyError
from verifier.policy.checks import option_check, rule_setting, shown
from verifier.policy.schema import RENAMED_KEYS, RENAMED_VALUES, SCHEMA, Items, PathMap, _RuleSection
from verifier.rules import Rule
from verifier.rules.catalog import load_all

MAX_EXPANDED_NODES = 20_000
MAX_KEY_LENGTH = 200  # rule ids and option names are far shorter; a longer key is quoted cut short


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
    repo_path: str | None = None  # the file's path in the repository, for a layer read from the base revision


def error_at(where: Located, key: str, problem: str) -> PolicyError:
    """A :class:`PolicyError` at the place ``where`` was read from."""
    return PolicyError(where.source, where.line, key, problem, column=where.column or None)


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
    _refuse_bombs(node, source)
    if not isinstance(node, yaml.MappingNode):
        raise _node_error(source, node, None, "the policy must be a mapping of keys")
    return _mapping(node, SCHEMA, source, prefix="")


def _refuse_bombs(root: yaml.Node, source: str) -> None:
    """Refuse a file whose aliases expand to more than :data:`MAX_EXPANDED_NODES` values (a few lines of
    nested aliases can stand for billions); the size is counted once per distinct node, so counting
    is quick whatever the expansion."""
    sizes: dict[int, int] = {}
    pending: list[tuple[yaml.Node, bool]] = [(root, False)]
    while pending:
        node, children_done = pending.pop()
        if id(node) in sizes:
            continue
        children = _children(node)
        if not children_done and children:
            pending.append((node, True))
            pending.extend((child, False) for child in children if id(child) not in sizes)
            continue
        size = 1 + sum(sizes.get(id(child), 1) for child in children)
        sizes[id(node)] = size
        if size > MAX_EXPANDED_NODES:
            raise _node_error(
                source,
                node,
                None,
                f"this value expands to more than {MAX_EXPANDED_NODES} items (through YAML aliases); "
                "a policy is a short file: write the values out",
            )


def _children(node: yaml.Node) -> list[yaml.Node]:
    if isinstance(node, yaml.MappingNode):
        return [part for pair in node.value for part in pair]
    if isinstance(node, yaml.SequenceNode):
        return list(node.value)
    return []


def _node_error(source: str, node: yaml.Node, key: str | None, problem: str) -> PolicyError:
    return PolicyError(source, node.start_mark.line + 1, key, problem, column=node.start_mark.column + 1)


def _locate(value: Any, node: yaml.Node, source: str) -> Located:
    return Located(value, node.start_mark.line + 1, source, node.start_mark.column + 1)


def _mapping(node: yaml.MappingNode, schema: Mapping[str, Any], source: str, prefix: str) -> dict[str, Any]:
    result: dict[str, Any] = {}
    for key_node, value_node in node.value:
        key = _key(key_node, source, prefix)
        dotted = f"{prefix}{key}"
        expected = schema.get(key)
        if expected is None and dotted in RENAMED_KEYS:
            new, example = RENAMED_KEYS[dotted]
            raise _node_error(source, key_node, dotted, f"was renamed '{new}'; write {example}")
        if expected is None:
            raise _node_error(source, key_node, dotted, _unknown(key, schema))
        if key in result:
            raise _node_error(source, key_node, dotted, "given twice")
        result[key] = _value(value_node, expected, source, dotted)
    return result


def _key(node: yaml.Node, source: str, prefix: str) -> str:
    """A mapping key: a plain word (a list or mapping as a key is refused without quoting it whole)."""
    if not isinstance(node, yaml.ScalarNode):
        raise _node_error(source, node, prefix.rstrip(".") or None, "a key must be a plain word, not a list or mapping")
    key = str(node.value)
    if len(key) > MAX_KEY_LENGTH:
        raise _node_error(source, node, prefix.rstrip(".") or None, f"a key must be a short word, got {shown(key)}")
    return key


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
    if isinstance(expected, PathMap):
        return _path_map(node, expected, source, dotted)
    value = _construct(node, source, dotted)
    renamed = RENAMED_VALUES.get(dotted, {})
    if isinstance(value, str) and value in renamed:
        new = renamed[value]
        raise _node_error(source, node, dotted, f"the value '{value}' was renamed '{new}'; write {new}")
    problem = expected(value)
    if problem:
        raise _node_error(source, node, dotted, problem)
    return _locate(value, node, source)


def _construct(node: yaml.Node, source: str, dotted: str) -> Any:
    try:
        return yaml.SafeLoader("").construct_document(node)
    except (yaml.YAMLError, ValueError) as error:  # e.g. a date like 2026-13-01, an integer of 5,000 digits
        raise _node_error(source, node, dotted, f"not a valid value: {shown(str(error))}") from error


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


def _path_map(node: yaml.Node, paths: PathMap, source: str, dotted: str) -> list[dict[str, Any]]:
    """``paths:``: glob -> settings, in the order written; each entry as ``{"paths": [glob], ...settings}``."""
    if not isinstance(node, yaml.MappingNode):
        raise _node_error(
            source, node, dotted, 'expected a mapping of path glob to settings, e.g. "legacy/**": {coverage: ...}'
        )
    result: list[dict[str, Any]] = []
    seen: set[str] = set()
    for key_node, value_node in node.value:
        glob = _key(key_node, source, f"{dotted}.")
        where = f"{dotted}.{glob}"
        if not glob.strip():
            raise _node_error(source, key_node, where, "expected a path glob, got an empty key")
        if glob in seen:
            raise _node_error(source, key_node, where, "given twice")
        seen.add(glob)
        if not isinstance(value_node, yaml.MappingNode):
            raise _node_error(source, value_node, where, "expected a mapping of settings (coverage, rules)")
        entry = _mapping(value_node, paths.schema, source, prefix=f"{where}.")
        entry["paths"] = _locate([glob], key_node, source)
        entry["_at"] = _locate(len(result), key_node, source)
        result.append(entry)
    return result


def _check_waiver_rule(entry: Mapping[str, Any], key: str) -> None:
    rule_id = entry["rule"]
    registered = load_all().get(rule_id.value)
    if registered is None:
        raise error_at(rule_id, key, f"no rule '{rule_id.value}' (see 'verifier policy rules')")
    if registered.fixed:
        raise error_at(rule_id, key, "this rule is how the gate fails closed; it cannot be waived")


def _rules(node: yaml.Node, source: str, dotted: str) -> dict[str, Any]:
    if not isinstance(node, yaml.MappingNode):
        raise _node_error(source, node, dotted, "expected a mapping of rule id to block, advise or ignore")
    registry = load_all()
    settings: dict[str, Any] = {}
    for key_node, value_node in node.value:
        rule_id = _key(key_node, source, f"{dotted}.")
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


def _severity(node: yaml.Node, registered: Rule, source: str, key: str) -> Located:
    # the raw text: YAML 1.1 would read a bare ``off`` as false
    value = node.value if isinstance(node, yaml.ScalarNode) else None
    problem = rule_setting(value)
    if problem:
        raise _node_error(source, node, key, problem)
    if registered.fixed and value != "block":
        raise _node_error(source, node, key, "this rule is how the gate fails closed; it always blocks")
    return _locate(value, node, source)


def _rule_mapping(node: yaml.MappingNode, registered: Rule, source: str, key: str) -> dict[str, Any]:
    section: dict[str, Any] = {"options": {}}
    for name_node, value_node in node.value:
        name = _key(name_node, source, f"{key}.")
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
        _check_items(registered, name, value, value_node, source, f"{key}.{name}")
        section["options"][name] = _locate(_like(default, value), value_node, source)
    return section


def _check_items(registered: Rule, name: str, value: Any, node: yaml.Node, source: str, key: str) -> None:
    """Let the rule judge each entry of a list option, so a bad entry is located here, at its line."""
    problems_of = registered.entry_checks.get(name)
    if problems_of is None or not isinstance(node, yaml.SequenceNode):
        return
    for index, (item, item_node) in enumerate(zip(value, node.value, strict=True)):
        problems = problems_of(item)
        if problems:
            raise _node_error(source, item_node, f"{key}[{index}]", "; ".join(problems))


def _like(default: Any, value: Any) -> Any:
    """The policy's value in the shape of the default (a tuple stays a tuple, an int for a float is a float)."""
    if isinstance(default, tuple) and isinstance(value, list):
        return tuple(value)
    if isinstance(default, float) and isinstance(value, int):
        return float(value)
    return value
