"""What ``verifier policy show|explain|rules`` print: the effective policy with the origin of every value,
and the rules from the registry. Plain functions returning text (or plain data for ``--format json``).
"""

from __future__ import annotations

import json
import textwrap
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from verifier.policy.build import merge_layers
from verifier.policy.parse import Layer, Located

RULE_DEFAULT = "rule default"
_SECTIONS = ("version", "coverage", "tests", "limits", "sandbox", "selection")


@dataclass(frozen=True)
class Shown:
    """One value of the effective policy and where it came from (``file:line``, or the rule's default)."""

    key: str
    value: Any
    origin: str


def effective_values(layers: list[Layer]) -> list[Shown]:
    """Every value of the merged policy, rule defaults included, in the order of the policy format."""
    merged = merge_layers(layer.data for layer in layers)
    rows: list[Shown] = []
    for section in _SECTIONS:
        if section in merged:
            rows += _flatten(section, merged[section])
    rows += _rule_rows("rules", merged.get("rules", {}), with_defaults=True)
    for entry in merged.get("paths", []):
        rows += _entry_rows(f"paths.{entry['paths'].value[0]}", {k: v for k, v in entry.items() if k != "paths"})
    for index, entry in enumerate(merged.get("waivers", [])):
        rows += _entry_rows(f"waivers[{index}]", entry)
    return rows


def _flatten(prefix: str, value: Any) -> list[Shown]:
    if isinstance(value, Located):
        return [Shown(prefix, value.value, value.where)]
    rows: list[Shown] = []
    for key, item in value.items():
        if key != "_at":
            rows += _flatten(f"{prefix}.{key}", item)
    return rows


def _rule_rows(prefix: str, sections: Mapping[str, Any], with_defaults: bool) -> list[Shown]:
    from verifier.rules.catalog import load_all

    registry = load_all()
    rows: list[Shown] = []
    for rule_id in registry if with_defaults else sections:
        registered = registry[rule_id]
        section = sections.get(rule_id, {})
        severity = section.get("severity")
        if severity is not None:
            rows.append(Shown(f"{prefix}.{rule_id}.severity", severity.value, severity.where))
        elif with_defaults:
            rows.append(Shown(f"{prefix}.{rule_id}.severity", registered.default, RULE_DEFAULT))
        for name, default in registered.options.items():
            given = section.get("options", {}).get(name)
            if given is not None:
                rows.append(Shown(f"{prefix}.{rule_id}.{name}", given.value, given.where))
            elif with_defaults:
                rows.append(Shown(f"{prefix}.{rule_id}.{name}", default, RULE_DEFAULT))
    return rows


def _entry_rows(prefix: str, entry: Mapping[str, Any]) -> list[Shown]:
    rows: list[Shown] = []
    for key, item in entry.items():
        if key == "rules":
            rows += _rule_rows(f"{prefix}.rules", item, with_defaults=False)
        elif key != "_at":
            rows += _flatten(f"{prefix}.{key}", item)
    return rows


def _plain(value: Any) -> Any:
    if isinstance(value, tuple):
        return list(value)
    return value


def render_show(layers: list[Layer]) -> str:
    """The effective policy as text: the layers, then one ``key = value  (origin)`` line per value."""
    rows = effective_values(layers)
    lines = ["layers, later ones winning: " + ", ".join(layer.label for layer in layers)]
    width = max((len(f"{row.key} = {_text(row.value)}") for row in rows), default=0)
    for row in rows:
        text = f"{row.key} = {_text(row.value)}"
        lines.append(f"{text:<{min(width, 70)}}  ({row.origin})")
    return "\n".join(lines) + "\n"


def render_show_json(layers: list[Layer], waiver_notes: tuple[str, ...] = ()) -> str:
    """The effective policy as data; ``replaced_lists`` are the lists that drop entries of a default."""
    from verifier.policy.notices import replaced_lists

    data = {
        "layers": [layer.label for layer in layers],
        "values": [{"key": r.key, "value": _plain(r.value), "from": r.origin} for r in effective_values(layers)],
        "replaced_lists": [replaced.as_data() for replaced in replaced_lists(layers)],
        "waiver_notes": list(waiver_notes),
    }
    return json.dumps(data, indent=2, default=str) + "\n"


def _text(value: Any) -> str:
    return json.dumps(_plain(value), default=str, ensure_ascii=False)


def render_rules() -> str:
    """One line per rule: id, default setting, stage, summary (``verifier rules``, ``verifier policy rules``)."""
    from verifier.rules.catalog import load_all

    rows = [f"{rule.id:<22} {rule.default:<6} {rule.stage:<8} {rule.summary}" for rule in load_all().values()]
    return "\n".join(rows) + "\n"


def render_explain(rule_id: str) -> str | None:
    """What the rule catches, why and how to fix a finding (its explanation), its options and sources."""
    from verifier.rules.catalog import load_all

    rule = load_all().get(rule_id)
    if rule is None:
        return None
    fixed = " (cannot be switched off or waived: it is how the gate fails closed)" if rule.fixed else ""
    lines = [
        f"{rule.id}: {rule.summary}",
        f"default: {rule.default}{fixed}; stage: {rule.stage}",
        "",
        textwrap.fill(rule.explanation, width=100),
    ]
    if rule.options:
        lines += ["", "options (policy: rules: {" + rule.id + ": {severity: ..., <option>: <value>}}):"]
        lines += [f"  {name} = {_text(default)}" for name, default in rule.options.items()]
    if rule.sources:
        lines += ["", "sources:"]
        lines += [f"  - {source}" for source in rule.sources]
    return "\n".join(lines) + "\n"
