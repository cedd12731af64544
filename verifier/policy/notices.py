"""Notices about a valid policy that its reader may not expect: a list that replaces the list below it and
drops entries. A list key (``coverage.exclude``, ``selection.ignore_paths``, a rule's list option) in a
later layer replaces the value of the layers below it, the shipped default's included; only the
:data:`~verifier.policy.build.JOINED_KEYS` are joined. That is the rule, and a replaced default may be
intended, so it is a notice (the policy stays valid), naming the key, where it was written, what it
replaces and the dropped entries, with the list to write to keep them."""

from __future__ import annotations

import json
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from typing import Any

from verifier.policy.build import JOINED_KEYS, merge_layers
from verifier.policy.parse import Layer, Located

RULE_DEFAULT = "the rule's default"
ADDING_OPTION = "extra"  # a rule's list option that adds to its default list instead of replacing it


@dataclass(frozen=True)
class ReplacedList:
    """A list in a layer that replaces the list below it and drops some of its entries."""

    key: str  # as written in the policy file: coverage.exclude, rules.paths.protected.paths
    where: str  # file:line of the replacing list
    replaced: str  # file:line of the list it replaces, or RULE_DEFAULT
    value: tuple[Any, ...]
    dropped: tuple[Any, ...]
    adding_key: str = ""  # a list option that adds to the default instead (a rule's ``extra``), if any

    @property
    def message(self) -> str:
        dropped = ", ".join(_quoted(entry) for entry in self.dropped)
        kept = _quoted([*self.value, *self.dropped])
        joined = " and ".join(JOINED_KEYS)
        adding = f", or give only your own entries in {self.adding_key}, which adds to the default" * bool(
            self.adding_key
        )
        return (
            f"{self.where}: {self.key} replaces the list of {self.replaced} and drops {dropped}; "
            f"a list replaces the one below it (only {joined} are joined across layers), so to keep them "
            f"list them again: {self.key.rsplit('.', 1)[-1]}: {kept}{adding}"
        )

    def as_data(self) -> dict[str, Any]:
        return {
            "key": self.key,
            "at": self.where,
            "replaces": self.replaced,
            "dropped": list(self.dropped),
            "message": self.message,
        }


def replaced_lists(layers: list[Layer]) -> list[ReplacedList]:
    """Every list of a layer above the shipped default that drops entries of the list below it."""
    found: list[ReplacedList] = []
    for index in range(1, len(layers)):
        below = merge_layers(layer.data for layer in layers[:index])
        found += _walk(layers[index].data, below, "")
    return found


def _walk(data: Mapping[str, Any], below: Mapping[str, Any], prefix: str) -> Iterator[ReplacedList]:
    for key, value in data.items():
        if key.startswith("_") or (not prefix and key in JOINED_KEYS):
            continue
        under = below.get(key)
        if not prefix and key == "rules":
            yield from _rule_lists(value, under or {})
        elif isinstance(value, Located):
            if isinstance(under, Located):
                yield from _dropped(f"{prefix}{key}", value, under.value, under.where)
        elif isinstance(value, Mapping):
            yield from _walk(value, under if isinstance(under, Mapping) else {}, f"{prefix}{key}.")


def _rule_lists(sections: Mapping[str, Any], below: Mapping[str, Any]) -> Iterator[ReplacedList]:
    """A rule's list option replaces the layers' value below, else the rule's own default."""
    from verifier.rules.catalog import load_all

    registry = load_all()
    for rule_id, section in sections.items():
        given_below = below.get(rule_id, {}).get("options", {})
        defaults = registry[rule_id].options if rule_id in registry else {}
        for name, value in section.get("options", {}).items():
            under = given_below.get(name)
            given = isinstance(under, Located)
            old, origin = (under.value, under.where) if given else (defaults.get(name), RULE_DEFAULT)
            adding = f"rules.{rule_id}.{ADDING_OPTION}" if ADDING_OPTION in defaults and name != ADDING_OPTION else ""
            yield from _dropped(f"rules.{rule_id}.{name}", value, old, origin, adding)


def _dropped(key: str, value: Located, old: Any, origin: str, adding_key: str = "") -> Iterator[ReplacedList]:
    if not isinstance(value.value, (list, tuple)) or not isinstance(old, (list, tuple)):
        return
    dropped = tuple(entry for entry in old if entry not in value.value)
    if dropped:
        yield ReplacedList(key, value.where, origin, tuple(value.value), dropped, adding_key)


def _quoted(value: Any) -> str:
    return json.dumps(list(value) if isinstance(value, tuple) else value, default=str, ensure_ascii=False)
