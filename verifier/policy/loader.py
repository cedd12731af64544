"""The policy stage: the trusted rules that judge a change, layered, validated, with overrides and waivers.

This module finds the layers and reads them; :mod:`~verifier.policy.schema` says what a file may hold,
:mod:`~verifier.policy.parse` validates one file, :mod:`~verifier.policy.build` merges the layers into the
typed :class:`~verifier.models.Policy`. How a finding is judged by it is the verdict stage's business.

Layers, later ones overriding earlier ones key by key: the shipped ``policies/default.yaml``; an optional
organisation policy (``--org-policy PATH`` or ``$VERIFIER_ORG_POLICY``); then the repository's
``verifier.yaml`` as it is at the **base** revision. A layer's ``builds_on:`` names a shipped policy by name or
another file by path; that file sits just below the layer that names it. ``paths`` (per-path settings) and
``waivers`` are joined across layers, in order. The change under review never gets a say in how it
is judged: its own ``verifier.yaml`` (waivers included) is not read.

Every key is validated against :data:`~verifier.policy.schema.SCHEMA`; a broken file, an unknown key or a
wrongly typed value is a :class:`PolicyError` naming the file, line, column and key. Every value keeps
where it came from, so ``verifier policy show`` can print the effective policy with the origin of each value.
"""

from __future__ import annotations

import os
import posixpath
from collections.abc import Callable
from datetime import date
from pathlib import Path

from verifier.errors import PolicyError
from verifier.gitio import Git
from verifier.models import Policy
from verifier.policy.build import build_policy
from verifier.policy.parse import Layer, Located, error_at, parse_layer
from verifier.policy.schema import POLICY_FILE, is_path, may_change_policy, shipped_dir, shipped_policies

__all__ = [
    "ORG_POLICY_ENV",
    "POLICY_FILE",
    "Layer",
    "build_policy",
    "check_policy_at",
    "file_layers",
    "load_policy",
    "load_policy_file",
    "may_change_policy",
    "org_policy_path",
    "parse_layer",
    "policy_layers",
    "read_file_layer",
    "shipped_dir",
    "shipped_layer",
    "shipped_policies",
    "staged_policy_layers",
]

ORG_POLICY_ENV = "VERIFIER_ORG_POLICY"
MAX_EXTENDS_DEPTH = 8


def shipped_layer(name: str) -> Layer:
    label = f"shipped:{name}.yaml"
    path = shipped_dir() / f"{name}.yaml"
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as error:
        raise PolicyError(label, None, None, f"cannot be read: {error.strerror}") from error
    return Layer(label, parse_layer(text, label))


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
    _refuse_org_policy_inside(git, org_policy_path(org_policy))
    layers = [shipped_layer("default"), *_org_layers(org_policy)]
    if base is not None:
        layers += _repository_layers(git, base)
    return _first_of_each(layers)


def staged_policy_layers(git: Git, org_policy: str | os.PathLike[str] | None = None) -> list[Layer]:
    """The layers as they would be after the commit being made: the repository's files from the index."""
    _refuse_org_policy_inside(git, org_policy_path(org_policy))
    return _first_of_each([shipped_layer("default"), *_org_layers(org_policy), *_repository_layers(git, None)])


def check_policy_at(git: Git, revision: str | None, org_policy: str | os.PathLike[str] | None = None) -> Policy:
    """Validate the policy as it is at ``revision`` (None: in the index); a broken one is a PolicyError
    naming ``revision:file:line``."""
    layers = staged_policy_layers(git, org_policy) if revision is None else policy_layers(git, revision, org_policy)
    return build_policy(layers)


def _repository_layers(git: Git, revision: str | None) -> list[Layer]:
    """``verifier.yaml`` at ``revision`` (None: the index) and the files it builds on, if it is there."""
    text = git.show_file(revision, POLICY_FILE)
    if text is None:
        return []
    prefix = "index" if revision is None else revision[:12]
    label = f"{prefix}:{POLICY_FILE}"
    layer = Layer(label, parse_layer(text.decode("utf-8", "replace"), label), repo_path=POLICY_FILE)
    return _with_extends(layer, _revision_reader(git, revision))


def _refuse_org_policy_inside(git: Git, path: Path | None) -> None:
    """The organisation policy judges the repository, so it cannot live in it: a change could edit it
    (a path from the environment may point into the checkout under review). Refused with exit 2."""
    if path is None:
        return
    target = os.path.realpath(path)
    for folder in (git.toplevel(), git.common_dir()):
        inside = os.path.realpath(folder)
        if os.path.commonpath([target, inside]) == inside:
            raise PolicyError(
                str(path),
                None,
                "organisation policy",
                f"is inside the repository being checked ({inside}), where a change can edit it; "
                f"keep the organisation policy outside the repository (--org-policy or ${ORG_POLICY_ENV})",
            )


def file_layers(path: Path, root: Path, org_policy: str | os.PathLike[str] | None = None) -> list[Layer]:
    """The layers for a policy file on disk (``verifier policy check``); its ``builds_on:`` paths are
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


Reader = Callable[[str, Located], Layer]  # (relative path, the builds_on value) -> the layer it names


def _revision_reader(git: Git, base: str | None) -> Reader:
    """Read the files a policy builds on at ``base`` (None: from the index)."""
    prefix = "index" if base is None else base[:12]
    where_read = "in the index" if base is None else f"at the base revision {prefix}"

    def read(path: str, where: Located) -> Layer:
        clean = _relative(path, where)
        label = f"{prefix}:{clean}"
        text = git.show_file(base, clean)
        if text is None:
            raise error_at(where, "builds_on", f"no file '{clean}' {where_read}")
        return Layer(label, parse_layer(text.decode("utf-8", "replace"), label), repo_path=clean)

    return read


def _disk_reader(root: Path) -> Reader:
    def read(path: str, where: Located) -> Layer:
        target = root / _relative(path, where)
        if not target.is_file():
            raise error_at(where, "builds_on", f"no file '{target}'")
        return read_file_layer(target)

    return read


def _relative(path: str, where: Located) -> str:
    clean = posixpath.normpath(path)
    if clean.startswith(("/", "../")) or clean == "..":
        raise error_at(where, "builds_on", f"'{path}' must be a path inside the repository")
    return clean


def _with_extends(layer: Layer, read: Reader, depth: int = 0) -> list[Layer]:
    """``layer`` preceded by the chain of files it builds on (each below the one that names it)."""
    extends = layer.data.get("builds_on")
    if extends is None or extends.value == "default":
        return [layer]
    if depth >= MAX_EXTENDS_DEPTH:
        raise error_at(extends, "builds_on", f"more than {MAX_EXTENDS_DEPTH} policies build on one another (a cycle?)")
    parent = read(extends.value, extends) if is_path(extends.value) else shipped_layer(extends.value)
    if parent.label == layer.label:
        raise error_at(extends, "builds_on", "a policy cannot build on itself")
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
