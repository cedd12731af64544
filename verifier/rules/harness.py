"""``config.harness``: machine-written changes to what runs or measures the tests (and so could fake them)."""

from __future__ import annotations

import configparser
import re
import sys
from collections.abc import Callable, Iterator
from typing import Any

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
    "**/pytest.toml",
    "**/.pytest.toml",
    "**/pytest.ini",
    "**/.pytest.ini",
    "**/.coveragerc",
    "**/.gitattributes",  # git attributes change what is archived and diffed (export-ignore, export-subst, -diff)
    "**/sitecustomize.py",
    "**/usercustomize.py",
    "**/*.pth",
]
# coverage.py's default exclusion pattern (the same text as coverage.config.DEFAULT_EXCLUDE[0]).
DEFAULT_PRAGMA = r"#\s*(pragma|PRAGMA)[:\s]?\s*(no|NO)\s*(cover|COVER)"
COVERAGE_CONFIGS = (".coveragerc", "setup.cfg", "tox.ini", "pyproject.toml")
# Every file name pytest reads its configuration from, in the order it looks for them (pytest 9's
# _pytest/config/findpaths.py, locate_config), and conftest.py, which it imports as a plugin.
PYTEST_CONFIGS = ("pytest.toml", ".pytest.toml", "pytest.ini", ".pytest.ini", "pyproject.toml", "tox.ini", "setup.cfg")
PYTEST_PLUGIN_FILES = ("conftest.py",)
# Installed modules the harness depends on; a top-level module of the tree named like one, or like a
# standard module, would be imported in its place wherever the tree's folders came first.
TOOL_MODULES = frozenset({"pytest", "_pytest", "py", "pluggy", "coverage", "xdist", "execnet", "verifier"})
HARNESS_MODULE_PREFIXES = ("verifier_recorder_",)
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
        yield from _shadowing_module(context, file)
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
    elif machine_changed(context, file):
        before, after = (_tool_settings(name, text) for text in (base_text(context, file), head_text(context, file)))
        if before != after:
            yield Finding(
                RULE_ID,
                "block",
                "pytest or coverage configuration changed by a machine-written change (read with a "
                + ("TOML" if name.endswith(".toml") else "INI")
                + " parser)",
                path=file.path,
                line=min(machine_lines(context, file.path), default=None),
            )


def _tool_settings(file_name: str, text: str | None) -> Any:
    """pytest's and coverage.py's settings in a config file, parsed; a file no parser reads is its text."""
    if text is None:
        return None
    if file_name.endswith(".toml"):
        document = load_toml(text)
        if document is None:
            return ("unparsable", text)
        tool = document.get("tool", {}) if isinstance(document.get("tool"), dict) else document.get("tool")
        if not isinstance(tool, dict):
            return tool
        return {key: value for key, value in tool.items() if key in ("pytest", "coverage")}
    parser = configparser.RawConfigParser(strict=False)
    try:
        parser.read_string(text)
    except configparser.Error:
        return ("unparsable", text)
    wanted = ("pytest", "tool:pytest")
    return {
        section: dict(parser.items(section))
        for section in parser.sections()
        if section in wanted or section.startswith("coverage:")
    }


def _shadowing_module(context: RuleContext, file: FileChange) -> Iterator[Finding]:
    """A machine-added top-level module named like a standard module, a tool the harness uses, or the harness."""
    if file.status not in ("added", "renamed", "copied") or not machine_changed(context, file):
        return
    name = top_level_module(file.path, tuple(context.policy.python_path), lambda p: _is_package(context, p))
    if name is None or not shadows(name):
        return
    yield Finding(
        RULE_ID,
        "block",
        f"machine-written top-level module '{name}' is named like a standard or harness module it could replace",
        path=file.path,
        line=min(machine_lines(context, file.path), default=None),
        details={"module": name},
    )


def shadows(name: str) -> bool:
    """Would a top-level module ``name`` in the tree stand for a module the harness or the tools import?"""
    return name in sys.stdlib_module_names or name in TOOL_MODULES or name.startswith(HARNESS_MODULE_PREFIXES)


def top_level_module(path: str, roots: tuple[str, ...], is_package: Callable[[str], bool]) -> str | None:
    """The top-level module name ``path`` defines, when its folder is an import root (one of ``roots``, the
    tree's root, or a folder that is not a package, which pytest puts on ``sys.path`` for its tests)."""
    parts = path.split("/")
    if parts[-1] == "__init__.py" and len(parts) >= 2:
        name, folder = parts[-2], "/".join(parts[:-2])
    elif parts[-1].endswith((".py", ".pyi")) or parts[-1].endswith((".so", ".pyd")):
        name, folder = parts[-1].split(".", 1)[0], "/".join(parts[:-1])
    else:
        return None
    clean_roots = {root.strip("./").rstrip("/") for root in roots} | {""}
    if folder in clean_roots or not is_package(folder):
        return name
    return None


def _is_package(context: RuleContext, folder: str) -> bool:
    init = f"{folder}/__init__.py" if folder else "__init__.py"
    if init in context.head_sources:
        return True
    changed = context.change.file(init)
    if changed is not None:
        return changed.status != "deleted"
    return context.read_base is not None and context.read_base(init) is not None


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
