"""``deps.added``: dependencies the change declares that the base did not (requirements files, pyproject.toml)."""

from __future__ import annotations

import re
from collections.abc import Iterator, Mapping
from typing import Any

from verifier.models import FileChange, Finding
from verifier.rules import RuleContext, rule
from verifier.rules.machine import base_text, glob_matcher, head_text, machine_changed, machine_lines, option
from verifier.tomlfile import load_toml

RULE_ID = "deps.added"
DEFAULT_REQUIREMENT_FILES = ["**/requirements*.txt", "**/requirements/*.txt", "**/requirements*.in"]
_NAME = re.compile(r"^\s*([A-Za-z0-9](?:[A-Za-z0-9._-]*[A-Za-z0-9])?)")


def normalise(name: str) -> str:
    """A project name in its normalised form (PEP 503: runs of '-', '_', '.' are one '-', lower case)."""
    return re.sub(r"[-_.]+", "-", name).lower()


def requirement_lines(text: str) -> dict[str, tuple[int, str]]:
    """Normalised name -> (line, requirement) for each requirement of a pip requirements file."""
    found: dict[str, tuple[int, str]] = {}
    for number, raw in enumerate(text.split("\n"), start=1):
        line = re.split(r"\s+#", raw, maxsplit=1)[0].strip()
        if not line or line.startswith("#"):
            continue
        if line.startswith(("-e ", "--editable ")):
            target = line.split(None, 1)[1].strip()
            found.setdefault(target, (number, line))
        elif line.startswith("-"):
            continue  # options such as -r, -c, --index-url
        elif "://" in line.split(";", 1)[0] and " @ " not in line:
            found.setdefault(line, (number, line))
        elif (match := _NAME.match(line)) is not None:
            found.setdefault(normalise(match.group(1)), (number, line))
    return found


def pyproject_requirements(text: str) -> dict[str, str]:
    """Normalised name -> declared requirement, from [project] dependencies and optional dependencies,
    [dependency-groups] and Poetry's dependency tables."""
    data = load_toml(text) or {}
    declared: list[str] = []
    project = data.get("project", {})
    declared += _strings(project.get("dependencies"))
    for group in _mapping(project.get("optional-dependencies")).values():
        declared += _strings(group)
    for group in _mapping(data.get("dependency-groups")).values():
        declared += _strings(group)
    found = {normalise(m.group(1)): item for item in declared if (m := _NAME.match(item))}
    poetry = _mapping(_mapping(data.get("tool")).get("poetry"))
    tables = [poetry.get("dependencies"), poetry.get("dev-dependencies")]
    tables += [_mapping(g).get("dependencies") for g in _mapping(poetry.get("group")).values()]
    for table in tables:
        for name, spec in _mapping(table).items():
            if name.lower() != "python":
                found.setdefault(normalise(name), f"{name} {spec}" if isinstance(spec, str) else name)
    return found


def _strings(value: Any) -> list[str]:
    return [v for v in value if isinstance(v, str)] if isinstance(value, list) else []


def _mapping(value: Any) -> Mapping[str, Any]:
    return value if isinstance(value, Mapping) else {}


def _line_of(text: str, name: str) -> int | None:
    """The first line of a pyproject.toml that declares ``name`` (as a quoted requirement or a table key)."""
    pattern = re.compile(
        r"""(["']\s*|^\s*)"""
        + r"[-_.]?".join(re.escape(p) for p in re.split(r"-", name))
        + r"""\s*(?:[\[<>=!~;@ "']|$)""",
        re.IGNORECASE,
    )
    return next((n for n, line in enumerate(text.split("\n"), start=1) if pattern.search(line)), None)


@rule(
    RULE_ID,
    default="advise",
    summary="new dependencies declared by machine-written lines",
    stage="static",
    options={"requirement_files": list(DEFAULT_REQUIREMENT_FILES)},
    sources=(
        "PEP 503 (name normalisation)",
        "PEP 621 ([project] dependencies)",
        "PEP 735 ([dependency-groups])",
        "pip documentation: requirements file format",
        "CWE-1357",
    ),
)
def added_dependencies(context: RuleContext) -> Iterator[Finding]:
    """Every dependency a model adds is code the project will run without having reviewed it (and a
    name a model may have made up). New requirements in requirements files and in pyproject.toml
    ([project] dependencies, optional dependencies, dependency groups, Poetry's tables) are listed, one
    finding each. Check that the project exists, is the one meant, and is worth depending on; then have
    a human add it."""
    is_requirements = glob_matcher(tuple(option(context, RULE_ID, "requirement_files")))
    for file in context.change.files:
        if file.status == "deleted":
            continue
        if is_requirements(file.path):
            yield from _new_requirements(context, file)
        elif file.path.rsplit("/", 1)[-1] == "pyproject.toml":
            yield from _new_pyproject_dependencies(context, file)


def _new_requirements(context: RuleContext, file: FileChange) -> Iterator[Finding]:
    before = requirement_lines(base_text(context, file) or "")
    lines = machine_lines(context, file.path)
    for name, (number, requirement) in requirement_lines(head_text(context, file) or "").items():
        if name not in before and number in lines:
            yield _finding(requirement, file.path, number)


def _new_pyproject_dependencies(context: RuleContext, file: FileChange) -> Iterator[Finding]:
    head = head_text(context, file) or ""
    before = pyproject_requirements(base_text(context, file) or "")
    lines = machine_lines(context, file.path)
    for name, requirement in pyproject_requirements(head).items():
        if name in before:
            continue
        number = _line_of(head, name)
        if (number in lines) if number is not None else machine_changed(context, file):
            yield _finding(requirement, file.path, number)


def _finding(requirement: str, path: str, line: int | None) -> Finding:
    return Finding(
        RULE_ID,
        "warn",
        f"new dependency declared: {requirement}",
        path=path,
        line=line,
        details={"requirement": requirement},
    )
