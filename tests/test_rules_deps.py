"""deps.added on real commits: requirements files and pyproject.toml, new names only, machine lines only."""

from __future__ import annotations

from test_rules_support import findings, machine_change

from verifier.demo.scratch import ScratchRepo
from verifier.rules.deps import normalise, pyproject_requirements, requirement_lines

PYPROJECT = """[project]
name = "parcelkit"
dependencies = [
  "PyYAML>=6",
]

[project.optional-dependencies]
http = ["requests>=2.31"]
"""


def test_new_requirement_line(repo: ScratchRepo) -> None:
    base = {"requirements.txt": "PyYAML>=6\n"}
    context = machine_change(repo, base, {"requirements.txt": "pyyaml>=6.0.1\nparcel-geo==1.2  # zones\n"})
    found = findings("deps.added", context)
    assert [(f.line, f.details["requirement"]) for f in found] == [(2, "parcel-geo==1.2")]  # PyYAML is not new


def test_new_pyproject_dependencies(repo: ScratchRepo) -> None:
    head = PYPROJECT.replace('  "PyYAML>=6",\n', '  "PyYAML>=6",\n  "Parcel_Geo>=1.2",\n').replace(
        '["requests>=2.31"]', '["requests>=2.31", "httpx"]'
    )
    found = findings("deps.added", machine_change(repo, {"pyproject.toml": PYPROJECT}, {"pyproject.toml": head}))
    assert [(f.line, f.details["requirement"]) for f in found] == [(5, "Parcel_Geo>=1.2"), (9, "httpx")]


def test_human_added_dependency_is_not_listed(repo: ScratchRepo) -> None:
    context = machine_change(
        repo, {"requirements.txt": "PyYAML\n"}, {"requirements.txt": "PyYAML\nattrs\n"}, human=True
    )
    assert findings("deps.added", context) == []


def test_normalised_names() -> None:
    # PEP 503: "the name should be lowercased with all runs of the characters ., -, or _ replaced with a single -"
    # (quoted from memory).
    assert normalise("Parcel__Geo.Utils") == "parcel-geo-utils"
    requirements = "-r base.txt\n--index-url https://x\nattrs[extra]>=2 ; python_version>'3'\n"
    assert set(requirement_lines(requirements)) == {"attrs"}
    poetry = (
        '[tool.poetry.dependencies]\npython = "^3.11"\nattrs = "^23"\n'
        '[tool.poetry.group.dev.dependencies]\nruff = "*"\n'
    )
    assert set(pyproject_requirements(poetry)) == {"attrs", "ruff"}
