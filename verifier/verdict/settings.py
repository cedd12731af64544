"""The policy as it applies to one path: the policy's own values after the per-path overrides that match."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from verifier.models import Policy, RuleSetting
from verifier.pathglob import matches_any


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


def settings_for_path(policy: Policy, path: str | None) -> PathSettings:
    """The effective settings for ``path``; a change-wide finding (``None``) gets the policy's own."""
    threshold = policy.coverage_threshold
    rules = dict(policy.rules)
    options = {rule: dict(values) for rule, values in policy.rule_options.items()}
    applied = []
    for override in policy.overrides:
        if path is None or not matches_any(path, override.paths):
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
    return any(setting != "ignore" for setting in settings)
