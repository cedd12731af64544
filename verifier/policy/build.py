"""Building the typed :class:`~verifier.models.Policy` from validated layers: merged key by key, later
layers winning, ``paths`` and ``waivers`` joined. A waiver past its date is set apart (it waives
nothing, and the findings it covered count again); one expiring within :data:`WAIVER_NOTICE_DAYS` is
listed too, so the check and ``verifier policy check`` can warn about it ahead of time."""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from datetime import date, datetime, timedelta, timezone
from typing import Any

from verifier.models import Limits, PathOverride, Policy, RuleSetting, SelectionSettings, Waiver
from verifier.policy.parse import Layer

JOINED_KEYS = ("paths", "waivers")  # lists that later layers extend instead of replacing
WAIVER_NOTICE_DAYS = 14  # a waiver expiring within this many days is warned about


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
    """Merge the layers into the typed :class:`Policy`; waivers past their date (``today``, UTC by default)
    go to ``expired_waivers``, not ``waivers``."""
    merged = merge_layers(layer.data for layer in layers)

    def get(section: str, key: str) -> Any:
        return merged[section][key].value

    limits = merged["limits"]
    rules, options = _rule_values(merged.get("rules", {}))
    day = today or datetime.now(timezone.utc).date()
    every_waiver = [_waiver(entry) for entry in merged.get("waivers", [])]
    waivers = tuple(w for w in every_waiver if not _expired(w, day))
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
        expired_waivers=tuple(w for w in every_waiver if _expired(w, day)),
        expiring_waivers=tuple(w for w in waivers if _expires_within(w, day, WAIVER_NOTICE_DAYS)),
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


def _expired(waiver: Waiver, today: date) -> bool:
    """A waiver applies through its expiry date; from the day after, it waives nothing."""
    return date.fromisoformat(waiver.expires) < today


def _expires_within(waiver: Waiver, today: date, days: int) -> bool:
    return date.fromisoformat(waiver.expires) <= today + timedelta(days=days)
