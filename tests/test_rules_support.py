"""Helpers for the static rule tests: a RuleContext built from a real git repository.

The change, its provenance and the file texts come from the gate's own stages run on a scratch repository
(real git), so each rule sees exactly what it sees inside ``verifier check``.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from conftest import machine

from verifier.change.stage import RevisionSpec, read_change
from verifier.demo.scratch import ScratchRepo
from verifier.gitio import Git
from verifier.models import Finding, Policy
from verifier.pipeline import _base_reader, _changed_sources
from verifier.provenance.attribution import attribute
from verifier.rules import REGISTRY, RuleContext
from verifier.rules.catalog import load_all


def context_for(repo: ScratchRepo, spec: str, options: Mapping[str, Mapping[str, Any]] | None = None) -> RuleContext:
    """What the static rules see for ``spec`` (``C`` or ``A..B``) in ``repo``, under the given rule options."""
    git = Git(repo.path)
    change = read_change(git, RevisionSpec(spec))
    provenance = attribute(git, change)
    base, head = _changed_sources(git, change)
    policy = Policy(source="test policy", rule_options=dict(options or {}))
    return RuleContext(change, provenance, policy, head, base, read_base=_base_reader(git, change))


def machine_change(
    repo: ScratchRepo,
    base: Mapping[str, str] | None,
    files: Mapping[str, str],
    remove: tuple[str, ...] = (),
    options: Mapping[str, Mapping[str, Any]] | None = None,
    human: bool = False,
) -> RuleContext:
    """Commit ``base`` as a human, then ``files`` (and removals) as the model (or a human); the context of the last."""
    if base is not None:
        repo.commit("Base written by a person", dict(base))
    sha = repo.commit("Change by a person" if human else machine("Change"), dict(files), remove=remove)
    return context_for(repo, sha, options)


def findings(rule_id: str, context: RuleContext) -> list[Finding]:
    """The rule's raw findings (before the policy sets their severity)."""
    load_all()
    return list(REGISTRY[rule_id].check(context))


def lines_of(found: list[Finding], path: str | None = None) -> list[int | None]:
    return sorted((f.line for f in found if path is None or f.path == path), key=lambda n: n or 0)
