"""``config.harness``: machine-written changes to what runs or measures the tests (and so could fake them)."""

from __future__ import annotations

import configparser
import re
from collections.abc import Iterator

from verifier.models import FileChange, Finding
from verifier.rules import RuleContext, rule
from verifier.rules.machine import (
    base_text,
    glob_matcher,
    head_text,
    machine_changed,
    machine_lines,
    machine_removed,
    option,
)
from verifier.tomlfile import load_toml

RULE_ID = "config.harness"
# Files that change how pytest or Python start up, wholly: conftest.py plugins and fixtures, pytest's own
# ini files, coverage.py's rc file, the site module's startup hooks and path files.
HARNESS_FILES = [
    "**/conftest.py",
    "**/pytest.ini",
    "**/.pytest.ini",
    "**/.coveragerc",
    "**/sitecustomize.py",
    "**/usercustomize.py",
    "**/*.pth",
]
# coverage.py's default exclusion pattern (the same text as coverage.config.DEFAULT_EXCLUDE[0]).
DEFAULT_PRAGMA = r"#\s*(pragma|PRAGMA)[:\s]?\s*(no|NO)\s*(cover|COVER)"
COVERAGE_CONFIGS = (".coveragerc", "setup.cfg", "tox.ini", "pyproject.toml")
_TOML_HEADER = re.compile(r"^\[\[?\s*([A-Za-z0-9_.\"' -]+?)\s*\]\]?\s*(#.*)?$")
_INI_HEADER = re.compile(r"^\s*\[([^\]]+)\]")


def harness_section(file_name: str, section: str, line: str) -> bool:
    """Is a line in ``section`` of this config file pytest's or coverage.py's configuration?"""
    key = line.strip().replace('"', "").replace("'", "")
    if file_name == "pyproject.toml":
        if section.startswith(("tool.pytest", "tool.coverage")):
            return True
        return (section == "tool" and key.startswith(("pytest", "coverage"))) or (
            section == "" and key.startswith(("tool.pytest", "tool.coverage"))
        )
    if file_name == "setup.cfg":
        return section == "tool:pytest" or section.startswith("coverage:")
    if file_name == "tox.ini":
        return section == "pytest" or section.startswith("coverage:")
    return False


def sections_by_line(file_name: str, text: str) -> list[str]:
    """The section each line (index = line - 1) of an INI or TOML file is in ('' before the first)."""
    header = _TOML_HEADER if file_name.endswith(".toml") else _INI_HEADER
    current = ""
    found: list[str] = []
    for line in text.split("\n"):
        match = header.match(line)
        if match:
            current = match.group(1).replace('"', "").replace("'", "").strip()
        found.append(current)
    return found


def _lines_in_harness(file_name: str, text: str | None, numbers: frozenset[int]) -> list[tuple[int, str]]:
    if text is None or not numbers:
        return []
    rows = text.split("\n")
    sections = sections_by_line(file_name, text)
    return [
        (n, sections[n - 1])
        for n in sorted(numbers)
        if 0 < n <= len(rows) and harness_section(file_name, sections[n - 1], rows[n - 1])
    ]


def exclusion_patterns(config_texts: dict[str, str]) -> list[str]:
    """The lines-to-exclude regexes of a project's coverage configuration (``exclude_lines`` and
    ``exclude_also`` of the report section), from whichever of coverage.py's config files it has."""
    patterns: list[str] = []
    for name, text in config_texts.items():
        if name == "pyproject.toml":
            report = (load_toml(text) or {}).get("tool", {}).get("coverage", {}).get("report", {})
            values = [*report.get("exclude_lines", []), *report.get("exclude_also", [])]
        else:
            values = _ini_values(text, "report" if name == ".coveragerc" else "coverage:report")
        patterns += [v for v in values if isinstance(v, str) and v.strip()]
    return patterns


def _ini_values(text: str, section: str) -> list[str]:
    parser = configparser.ConfigParser(interpolation=None)
    try:
        parser.read_string(text)
    except configparser.Error:
        return []
    if not parser.has_section(section):
        return []
    values: list[str] = []
    for key in ("exclude_lines", "exclude_also"):
        values += [line.strip() for line in parser.get(section, key, fallback="").splitlines() if line.strip()]
    return values


def _compile(patterns: list[str]) -> list[re.Pattern[str]]:
    compiled = []
    for pattern in dict.fromkeys(patterns):
        try:
            compiled.append(re.compile(pattern))
        except re.error:
            continue  # coverage.py reports a broken pattern itself; it excludes nothing here
    return compiled


@rule(
    RULE_ID,
    default="block",
    summary="machine-written change to the test or coverage harness",
    stage="static",
    options={"files": list(HARNESS_FILES), "exclusion_patterns": []},
    sources=(
        "pytest documentation: conftest.py plugins; configuration files (pytest.ini, pyproject.toml, "
        "tox.ini, setup.cfg)",
        "coverage.py documentation: configuration reference; excluding code",
        "Python docs: site module (sitecustomize, usercustomize, .pth files)",
    ),
)
def harness_changes(context: RuleContext) -> Iterator[Finding]:
    """The gate trusts pytest and coverage.py to tell the truth, so a model must not change how they run:
    conftest.py files, pytest's and coverage.py's configuration (pytest.ini, .coveragerc, the pytest and
    coverage sections of pyproject.toml, setup.cfg and tox.ini), Python's startup hooks
    (sitecustomize.py, usercustomize.py, .pth files), and coverage exclusions (``# pragma: no cover``, or
    the project's own exclusion patterns) added on machine-written lines. Have a human make such
    changes, or remove the exclusion and test the line. Teams add file globs (option ``files``) and
    exclusion regexes (option ``exclusion_patterns``)."""
    is_harness = glob_matcher(tuple(option(context, RULE_ID, "files")))
    for file in context.change.files:
        names = [p for p in (file.path, file.old_path) if p]
        if any(is_harness(p) for p in names) and machine_changed(context, file):
            yield Finding(
                RULE_ID,
                "block",
                f"harness file {_verb(file)} by machine-written change",
                path=file.path,
                line=min(machine_lines(context, file.path), default=None),
            )
            continue
        yield from _config_sections(context, file)
    yield from _exclusions(context)


def _verb(file: FileChange) -> str:
    return {"added": "added", "deleted": "deleted", "renamed": "renamed"}.get(file.status, "changed")


def _config_sections(context: RuleContext, file: FileChange) -> Iterator[Finding]:
    name = file.path.rsplit("/", 1)[-1]
    if name not in ("pyproject.toml", "setup.cfg", "tox.ini"):
        return
    added = _lines_in_harness(name, head_text(context, file), machine_lines(context, file.path))
    removed_numbers = frozenset(file.removed_lines) if machine_removed(context, file) else frozenset()
    removed = _lines_in_harness(name, base_text(context, file), removed_numbers)
    if added or removed:
        sections = sorted({s for _, s in added + removed})
        yield Finding(
            RULE_ID,
            "block",
            f"pytest or coverage configuration changed by machine-written lines ([{'], ['.join(sections)}])",
            path=file.path,
            line=added[0][0] if added else None,
            details={"added": [n for n, _ in added], "removed": [n for n, _ in removed]},
        )


def _exclusions(context: RuleContext) -> Iterator[Finding]:
    configs = {name: text for name in COVERAGE_CONFIGS if (text := _base_config(context, name)) is not None}
    patterns = _compile([DEFAULT_PRAGMA, *exclusion_patterns(configs), *option(context, RULE_ID, "exclusion_patterns")])
    for path, lines in context.provenance.machine_lines.items():
        source = context.head_sources.get(path)
        if source is None or not path.endswith(".py"):
            continue
        # one pass over the file first (MULTILINE: '^' and '$' anchor at each line, as in the per-line search)
        present = [p for p in patterns if re.search(p.pattern, source, re.MULTILINE)]
        rows = source.split("\n") if present else []
        for number in lines if present else ():
            text = rows[number - 1] if 0 < number <= len(rows) else ""
            hit = next((p for p in present if p.search(text)), None)
            if hit is not None:
                yield Finding(
                    RULE_ID,
                    "block",
                    "coverage exclusion on a machine-written line: coverage.py will not measure it",
                    path=path,
                    line=number,
                    details={"pattern": hit.pattern},
                )


def _base_config(context: RuleContext, name: str) -> str | None:
    """A coverage config file at the trusted base: from the change when it touched the file, else git."""
    if name in context.base_sources:
        return context.base_sources[name]
    changed = context.change.file(name)
    if changed is not None and changed.status == "added":
        return None
    return context.read_base(name) if context.read_base is not None else None
