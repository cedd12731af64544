"""Building the typed :class:`~verifier.models.Policy` from validated layers: merged key by key, later
layers winning, ``paths`` and ``waivers`` joined; an expired waiver is a :class:`PolicyError`."""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from datetime import date, datetime, timezone
from typing import Any

from verifier.models import Limits, PathOverride, Policy, RuleSetting, SelectionSettings, Waiver
from verifier.policy.parse import Layer, error_at

JOINED_KEYS = ("paths", "waivers")  # lists that later layers extend instead of replacing


def merge_layers(layers: Iterable[Mapping[str, Any]], top: bool = True) -> dict[str, Any]:
    """Deep-merge validated layers, later ones winning key by key; ``paths`` and ``waivers`` join."""
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
        overrides=tuple(_override(entry) for entry in merged.get("paths", [])),
        waivers=waivers,
        selection=_selection(merged.get("selection", {})),
        files=tuple(layer.repo_path for layer in layers if layer.repo_path is not None),
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
            raise error_at(
                entry["expires"],
                f"waivers[{entry['_at'].value}].expires",
                f"the waiver of {waiver.rule} for '{waiver.path}' (owner {waiver.owner}) expired on "
                f"{waiver.expires}; renew it with a later date or remove it",
            )
