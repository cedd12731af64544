"""``calls.banned``: dangerous calls (and a few dangerous assignments) on machine-written lines, by AST.

An entry names a dotted call or assignment target and, optionally, conditions on its arguments; the
defaults below cover the weaknesses of issue 4, and a team adds its own in the policy in the same
syntax (docs/rules.md, "calls.banned entries"):

    - call: acme.db.raw_sql          # dotted name as imported; '*' matches any run of characters
      when: {arg: 0, keyword: sql, is: non-literal}   # or a list of such conditions, all of which must hold
      cwe: CWE-89
      why: raw SQL built at run time; use acme.db.query with parameters
    - assign: "*.debug"              # an assignment to this target
      when: {is: true}               # a condition on the assigned value
      why: debug mode must not be switched on by generated code

Condition tests: ``literal``, ``non-literal``, ``true``, ``false``, ``not-false``, ``present``, ``missing``,
or ``in: [names or strings]`` / ``not-in: [...]``. An argument hidden by ``*args`` or ``**kwargs`` is
unknown: it satisfies the tests that mean danger (non-literal, not-false, not-in) and no other.
"""

from __future__ import annotations

import ast
import fnmatch
import itertools
import re
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from fnmatch import fnmatchcase
from typing import Any

from verifier.astnames import (
    PIECES,
    ModuleIndex,
    Names,
    canonical,
    constant_string,
    is_literal,
    module_index,
    namespace_of,
    resolve,
    span,
    walk,
)
from verifier.models import Finding
from verifier.rules import RuleContext, rule
from verifier.rules.machine import option

RULE_ID = "calls.banned"
TESTS = ("literal", "non-literal", "true", "false", "not-false", "present", "missing")
_DANGER_WHEN_UNKNOWN = ("non-literal", "not-false", "not-in")
_CONDITION_KEYS = ("arg", "keyword", "is", "in", "not-in")
_ENTRY_KEYS = ("call", "assign", "when", "cwe", "why", "doc")


@dataclass(frozen=True)
class Condition:
    """A test on one argument of a call (``arg`` position and/or ``keyword``), or on an assigned value."""

    test: str  # one of TESTS, or "in" / "not-in"
    arg: int | None = None
    keyword: str | None = None
    values: tuple[str, ...] = ()


@dataclass(frozen=True)
class Entry:
    """One banned call or assignment."""

    kind: str  # "call" or "assign"
    target: str  # dotted-name pattern
    why: str
    when: tuple[Condition, ...] = ()
    cwe: str | None = None
    doc: str = ""


# --- the entry syntax ---------------------------------------------------------------------------------


def entry_problems(value: Any) -> list[str]:
    """What is wrong with one policy entry (empty when it is valid); for the policy's validation."""
    if not isinstance(value, Mapping):
        return [f"an entry must be a mapping with 'call' or 'assign', got {value!r}"]
    problems = [
        f"unknown key '{key}' (expected one of {', '.join(_ENTRY_KEYS)})" for key in value if key not in _ENTRY_KEYS
    ]
    kinds = [k for k in ("call", "assign") if k in value]
    if len(kinds) != 1:
        problems.append("an entry needs exactly one of 'call' or 'assign'")
    elif not isinstance(value[kinds[0]], str) or not value[kinds[0]].strip():
        problems.append(f"'{kinds[0]}' must be a dotted name such as acme.db.raw_sql")
    if not isinstance(value.get("why"), str) or not value["why"].strip():
        problems.append("'why' (the reason, shown in every finding) is required")
    cwe = value.get("cwe")
    if cwe is not None and not (isinstance(cwe, str) and cwe.startswith("CWE-") and cwe[4:].isdigit()):
        problems.append(f"'cwe' must look like CWE-89, got {cwe!r}")
    if "doc" in value and not isinstance(value["doc"], str):
        problems.append("'doc' must be a string")
    when = value.get("when", [])
    for index, condition in enumerate(when if isinstance(when, list) else [when]):
        problems += [f"when[{index}]: {p}" for p in _condition_problems(condition, kinds[:1] == ["assign"])]
    return problems


def _condition_problems(condition: Any, on_assignment: bool) -> list[str]:
    if not isinstance(condition, Mapping):
        return [f"a condition must be a mapping, got {condition!r}"]
    problems = [
        f"unknown key '{key}' (expected one of {', '.join(_CONDITION_KEYS)})"
        for key in condition
        if key not in _CONDITION_KEYS
    ]
    tests = [k for k in ("is", "in", "not-in") if k in condition]
    if len(tests) != 1:
        problems.append("a condition needs exactly one of 'is', 'in' or 'not-in'")
    elif tests[0] == "is" and condition["is"] not in TESTS:
        problems.append(f"'is' must be one of {', '.join(TESTS)}, got {condition['is']!r}")
    elif tests[0] != "is" and not (
        isinstance(condition[tests[0]], list) and all(isinstance(v, str) for v in condition[tests[0]])
    ):
        problems.append(f"'{tests[0]}' must be a list of names or strings")
    arg, keyword = condition.get("arg"), condition.get("keyword")
    if arg is not None and (isinstance(arg, bool) or not isinstance(arg, int) or arg < 0):
        problems.append(f"'arg' must be a position (0 for the first argument), got {arg!r}")
    if keyword is not None and not (isinstance(keyword, str) and keyword.isidentifier()):
        problems.append(f"'keyword' must be an argument name, got {keyword!r}")
    if on_assignment and (arg is not None or keyword is not None):
        problems.append("a condition of an 'assign' entry tests the assigned value: no 'arg' or 'keyword'")
    if not on_assignment and arg is None and keyword is None:
        problems.append("a condition of a 'call' entry needs 'arg' and/or 'keyword'")
    return problems


def parse_entry(value: Mapping[str, Any]) -> Entry:
    """Build an entry from its policy form; raise ValueError listing the problems when it is invalid."""
    problems = entry_problems(value)
    if problems:
        raise ValueError("; ".join(problems))
    kind = "call" if "call" in value else "assign"
    when = value.get("when", [])
    conditions = tuple(_parse_condition(c) for c in (when if isinstance(when, list) else [when]))
    return Entry(kind, value[kind].strip(), value["why"].strip(), conditions, value.get("cwe"), value.get("doc", ""))


def _parse_condition(value: Mapping[str, Any]) -> Condition:
    test = next(k for k in ("is", "in", "not-in") if k in value)
    values = tuple(value[test]) if test != "is" else ()
    return Condition(value[test] if test == "is" else test, value.get("arg"), value.get("keyword"), values)


# --- the defaults -------------------------------------------------------------------------------------
# The documentation warnings below are quoted from memory of the Python documentation (and of PyYAML's
# and Requests' documentation for the two third-party entries); the wording may differ slightly.

_EVAL_DOC = (
    "Python docs, Built-in Functions, eval() and exec(): 'Warning: This function executes arbitrary "
    "code. Calling it with user-supplied input may lead to security vulnerabilities.'"
)
_SHELL_DOC = (
    "Python docs, subprocess module, Security Considerations: 'it is the application's "
    "responsibility to ensure that all whitespace and metacharacters are quoted appropriately to "
    "avoid shell injection vulnerabilities' when shell=True"
)
_OS_SHELL_DOC = (
    "Python docs, os module, Process Management, os.system(): runs the command in a subshell; "
    "'using the subprocess module is preferable'; see subprocess, Security Considerations"
)
_PICKLE_DOC = "Python docs, pickle module: 'Warning: The pickle module is not secure. Only unpickle data you trust.'"
_MARSHAL_DOC = (
    "Python docs, marshal module: 'Warning: The marshal module is not intended to be secure against "
    "erroneous or maliciously constructed data. Never unmarshal data received from an untrusted or "
    "unauthenticated source.'"
)
_SHELVE_DOC = (
    "Python docs, shelve module: 'Warning: Because the shelve module is backed by pickle, it is "
    "insecure to load a shelf from an untrusted source.'"
)
_YAML_DOC = (
    "PyYAML documentation, Loading YAML: 'Warning: It is not safe to call yaml.load with any data "
    "received from an untrusted source!'"
)
_MKTEMP_DOC = (
    "Python docs, tempfile module, Deprecated functions and variables, mktemp(): 'Warning: Use of "
    "this function may introduce a security hole in your program.'"
)
_TLS_DOC = (
    "Python docs, ssl module, Security considerations: certificate validation and hostname checking "
    "must stay on for client sockets (CERT_REQUIRED, check_hostname=True); Requests documentation, "
    "SSL Cert Verification: verify=False makes the application vulnerable to man-in-the-middle attacks"
)
_IMPORT_DOC = (
    "Python docs, Built-in Functions, __import__() and importlib.import_module(): the name decides "
    "which module's code runs on import"
)

_SAFE_YAML_LOADERS = ["yaml.SafeLoader", "yaml.CSafeLoader", "yaml.BaseLoader", "yaml.CBaseLoader"]
_NON_LITERAL_SOURCE = [{"arg": 0, "keyword": "source", "is": "non-literal"}]


def _always(target: str, cwe: str, why: str, doc: str, kind: str = "call") -> dict[str, Any]:
    return {kind: target, "cwe": cwe, "why": why, "doc": doc}


DEFAULT_ENTRIES: tuple[dict[str, Any], ...] = (
    {
        "call": "eval",
        "when": {"arg": 0, "is": "non-literal"},
        "cwe": "CWE-95",
        "why": "evaluates code built at run time",
        "doc": _EVAL_DOC,
    },
    {
        "call": "exec",
        "when": {"arg": 0, "is": "non-literal"},
        "cwe": "CWE-95",
        "why": "executes code built at run time",
        "doc": _EVAL_DOC,
    },
    {
        "call": "compile",
        "when": _NON_LITERAL_SOURCE,
        "cwe": "CWE-95",
        "why": "compiles code built at run time",
        "doc": _EVAL_DOC,
    },
    _always("os.system", "CWE-78", "runs a command through the shell", _OS_SHELL_DOC),
    _always("os.popen", "CWE-78", "runs a command through the shell", _OS_SHELL_DOC),
    _always("subprocess.getoutput", "CWE-78", "runs a command through the shell", _SHELL_DOC),
    _always("subprocess.getstatusoutput", "CWE-78", "runs a command through the shell", _SHELL_DOC),
    _always("asyncio.create_subprocess_shell", "CWE-78", "runs a command through the shell", _SHELL_DOC),
    {
        "call": "subprocess.*",
        "when": {"keyword": "shell", "is": "not-false"},
        "cwe": "CWE-78",
        "why": "runs a command through the shell (shell=True)",
        "doc": _SHELL_DOC,
    },
    _always("pickle.load", "CWE-502", "unpickling can run arbitrary code", _PICKLE_DOC),
    _always("pickle.loads", "CWE-502", "unpickling can run arbitrary code", _PICKLE_DOC),
    _always("pickle.Unpickler", "CWE-502", "unpickling can run arbitrary code", _PICKLE_DOC),
    _always("marshal.load", "CWE-502", "marshal is not safe against malicious data", _MARSHAL_DOC),
    _always("marshal.loads", "CWE-502", "marshal is not safe against malicious data", _MARSHAL_DOC),
    _always("shelve.open", "CWE-502", "a shelf is unpickled when read", _SHELVE_DOC),
    {
        "call": "yaml.load",
        "when": {"arg": 1, "keyword": "Loader", "not-in": _SAFE_YAML_LOADERS},
        "cwe": "CWE-502",
        "why": "yaml.load without a safe Loader can build arbitrary objects",
        "doc": _YAML_DOC,
    },
    {
        "call": "yaml.load_all",
        "when": {"arg": 1, "keyword": "Loader", "not-in": _SAFE_YAML_LOADERS},
        "cwe": "CWE-502",
        "why": "yaml.load_all without a safe Loader can build arbitrary objects",
        "doc": _YAML_DOC,
    },
    _always("yaml.unsafe_load", "CWE-502", "the unsafe loader can build arbitrary objects", _YAML_DOC),
    _always("yaml.unsafe_load_all", "CWE-502", "the unsafe loader can build arbitrary objects", _YAML_DOC),
    _always(
        "tempfile.mktemp",
        "CWE-377",
        "the name can be taken by another process before use; use tempfile.mkstemp or NamedTemporaryFile",
        _MKTEMP_DOC,
    ),
    {
        "call": "*",
        "when": {"keyword": "verify", "is": "false"},
        "cwe": "CWE-295",
        "why": "turns TLS certificate verification off (verify=False)",
        "doc": _TLS_DOC,
    },
    {
        "call": "*",
        "when": {"keyword": "cert_reqs", "in": ["ssl.CERT_NONE", "CERT_NONE"]},
        "cwe": "CWE-295",
        "why": "turns TLS certificate verification off (CERT_NONE)",
        "doc": _TLS_DOC,
    },
    _always("ssl._create_unverified_context", "CWE-295", "makes a TLS context that verifies nothing", _TLS_DOC),
    _always(
        "ssl._create_default_https_context",
        "CWE-295",
        "replaces the default TLS context for every HTTPS connection of the process",
        _TLS_DOC,
        kind="assign",
    ),
    {
        "assign": "*.check_hostname",
        "when": {"is": "false"},
        "cwe": "CWE-295",
        "why": "turns TLS hostname checking off",
        "doc": _TLS_DOC,
    },
    {
        "assign": "*.verify_mode",
        "when": {"in": ["ssl.CERT_NONE"]},
        "cwe": "CWE-295",
        "why": "turns TLS certificate verification off",
        "doc": _TLS_DOC,
    },
    {
        "assign": "*.verify",
        "when": {"is": "false"},
        "cwe": "CWE-295",
        "why": "turns TLS certificate verification off for a session",
        "doc": _TLS_DOC,
    },
    {
        "call": "__import__",
        "when": {"arg": 0, "keyword": "name", "is": "non-literal"},
        "cwe": "CWE-470",
        "why": "imports a module whose name is computed at run time",
        "doc": _IMPORT_DOC,
    },
    {
        "call": "importlib.import_module",
        "when": {"arg": 0, "keyword": "name", "is": "non-literal"},
        "cwe": "CWE-470",
        "why": "imports a module whose name is computed at run time",
        "doc": _IMPORT_DOC,
    },
)

_SOURCES = (
    "CWE-95",
    "CWE-78",
    "CWE-502",
    "CWE-377",
    "CWE-295",
    "CWE-470",
    "Python docs: Built-in Functions (eval, exec, compile, __import__)",
    "Python docs: subprocess, Security Considerations",
    "Python docs: os, Process Management",
    "Python docs: pickle, marshal, shelve (Warnings)",
    "Python docs: tempfile.mktemp (Warning)",
    "Python docs: ssl, Security considerations",
    "PyYAML documentation: Loading YAML",
    "Requests documentation: SSL Cert Verification",
)


def effective_entries(context: RuleContext) -> tuple[tuple[Entry, ...], list[str]]:
    """The default entries the policy does not ignore, then the team's own; and the problems of the
    team's entries that are invalid (reported as errors: a gate with a broken policy must not pass)."""
    ignored = tuple(option(context, RULE_ID, "ignore"))
    defaults = [parse_entry(e) for e in DEFAULT_ENTRIES]
    kept = [e for e in defaults if not any(fnmatchcase(e.target, pattern) for pattern in ignored)]
    problems: list[str] = []
    for index, value in enumerate(option(context, RULE_ID, "entries")):
        try:
            kept.append(parse_entry(value))
        except ValueError as error:
            problems.append(f"policy option {RULE_ID}.entries[{index}]: {error}")
    return tuple(kept), problems


# --- the rule -----------------------------------------------------------------------------------------


@rule(
    RULE_ID,
    default="block",
    summary="dangerous calls on machine-written lines (eval, shell, pickle, ...)",
    stage="static",
    options={"entries": [], "ignore": []},
    sources=_SOURCES,
    entry_checks={"entries": entry_problems},
)
def banned_calls(context: RuleContext) -> Iterator[Finding]:
    """Machine-written Python must not call what turns data into code or commands, or switch a safety
    check off: eval/exec/compile on computed input, a shell (os.system, os.popen, shell=True), pickle,
    marshal or shelve loads, yaml.load without a safe Loader, tempfile.mktemp, TLS verification turned
    off, imports by computed name. Imports and aliases are resolved, so ``import os as o; o.system(c)``
    counts; a call counts when its name or the argument that decides is on a machine-written line. Fix
    it with the safe form (a list of arguments without a shell, json or yaml.safe_load, mkstemp, verified
    TLS), or, when the call is right, have a human write it. Teams add entries in the policy (option
    ``entries``) and drop defaults (option ``ignore``: target patterns)."""
    entries, problems = effective_entries(context)
    for problem in problems:
        yield Finding(RULE_ID, "error", problem + " (see docs/rules.md, calls.banned entries)")
    calls = _EntryTable([e for e in entries if e.kind == "call"])
    assigns = _EntryTable([e for e in entries if e.kind == "assign"])
    needs = _Needs([required_text(e) for e in entries])
    for path, lines in context.provenance.machine_lines.items():
        source = context.head_sources.get(path)
        if not path.endswith(".py") or source is None or not lines or not needs.may_match(source):
            continue
        module = module_index(source, path)
        if module is not None and lines:
            yield from _check_module(module, path, frozenset(lines), calls, assigns)


def required_text(entry: Entry) -> tuple[tuple[str, ...], ...]:
    """Texts a module's source must hold for ``entry`` to match anything in it: all of the groups, one
    text of each group (empty: no such text is known, the module is always checked).

    A dotted name the analysis gives a call or target is made of identifiers written in the module
    (imports, assignments, attribute names; see :mod:`verifier.astnames`), so each part of the entry's
    target without wildcards must appear in the text. A keyword the entry's conditions need is written
    in the call, or hidden in ``**kwargs`` (unless the test holds for a missing argument). This holds
    only where identifiers are written as they are read, which :meth:`_Needs.may_match` checks."""
    # a part between dots (or the ends) matches one whole part of the name; a '[...]' set may hold dots
    parts = [] if "[" in entry.target else entry.target.split(".")
    groups: list[tuple[str, ...]] = [(part,) for part in parts if part.isidentifier()]
    for condition in entry.when:
        if condition.keyword is not None and condition.arg is None and condition.test not in ("missing", "not-in"):
            groups.append((condition.keyword, "**"))
    return tuple(sorted(groups, key=lambda group: -min(map(len, group))))  # longer texts are rarer: first


# Texts through which code reaches a function without writing its name, or runs a shell from an argument
# list: a source holding one is always checked.
_DYNAMIC_TEXTS = (
    "getattr",
    "__dict__",
    "vars(",
    "modules",
    "__builtins__",
    "partial",
    "import_module",
    "__import__",
    "sh'",
    'sh"',
    "cmd",
    "pwsh",
    "busybox",
)


class _Needs:
    """The entries' :func:`required_text`, for a quick look at each source: first which of all the texts
    it holds (one pass over a few dozen texts), then only the entries whose first text is among them."""

    def __init__(self, needs: Sequence[tuple[tuple[str, ...], ...]]) -> None:
        unique = list(dict.fromkeys(needs))
        self.always = any(not groups for groups in unique)
        self.texts = tuple(dict.fromkeys(text for groups in unique for group in groups for text in group))
        self.by_first: dict[str, list[tuple[tuple[str, ...], ...]]] = {}
        for groups in unique:
            for text in groups[0] if groups else ():
                self.by_first.setdefault(text, []).append(groups)

    def may_match(self, source: str) -> bool:
        """False only when no entry can match in ``source``.

        Outside ASCII the parser normalises identifiers (NFKC), so a name may be spelled otherwise in
        the text; ``getattr(obj, "na" "me")`` builds an attribute from a string; both are always checked."""
        if self.always or not source.isascii() or any(text in source for text in _DYNAMIC_TEXTS):
            return True
        if PIECES.search(source):
            return True
        present = {text for text in self.texts if text in source}
        for first in present.intersection(self.by_first):
            for groups in self.by_first[first]:
                if all(not present.isdisjoint(group) for group in groups[1:]):
                    return True
        return False


class _EntryTable:
    """Entries by exact target (one dict look-up per name) and the few with wildcards (a regex each)."""

    def __init__(self, entries: Sequence[Entry]) -> None:
        self.exact: dict[str, list[Entry]] = {}
        self.patterns: list[tuple[re.Pattern[str], Entry]] = []
        for entry in entries:
            if any(char in entry.target for char in "*?["):
                self.patterns.append((re.compile(fnmatch.translate(entry.target)), entry))
            else:
                self.exact.setdefault(entry.target, []).append(entry)

    def __bool__(self) -> bool:
        return bool(self.exact or self.patterns)

    def matching(self, candidates: Sequence[str]) -> Iterator[tuple[str, Entry]]:
        """(the name that matched, the entry) for each entry some candidate name matches, in entry order."""
        seen: set[int] = set()
        for name in candidates:
            for entry in self.exact.get(name, ()):
                if id(entry) not in seen:
                    seen.add(id(entry))
                    yield name, entry
            for pattern, entry in self.patterns:
                if id(entry) not in seen and pattern.match(name):
                    seen.add(id(entry))
                    yield name, entry


def _check_module(
    module: ModuleIndex, path: str, lines: frozenset[int], calls: _EntryTable, assigns: _EntryTable
) -> Iterator[Finding]:
    first, last = min(lines), max(lines)
    reported: set[int] = set()
    for node in module.calls if calls else ():
        if node.lineno <= last and (node.end_lineno or node.lineno) >= first:
            for finding in _check_call(node, path, lines, module.names, calls):
                reported.add(node.lineno)
                yield finding
    for assignment in module.assignments if assigns else ():
        if assignment.lineno <= last and (assignment.end_lineno or assignment.lineno) >= first:
            yield from _check_assignment(assignment, path, lines, module.names, assigns)
    for finding in hidden_calls(module, path, lines, calls):
        if finding.line not in reported:
            reported.add(finding.line or 0)
            yield finding


def _check_call(
    node: ast.Call, path: str, lines: frozenset[int], names: Names, entries: _EntryTable
) -> Iterator[Finding]:
    candidates = tuple(canonical(n) for n in resolve(node.func, names)) or ("?",)
    if any(c in _PARTIALS for c in candidates) and node.args and not isinstance(node.args[0], ast.Starred):
        # functools.partial(f, *args, **kwargs) is f called later with those arguments first (Python docs,
        # functools.partial): judge it as that call
        applied = ast.Call(func=node.args[0], args=node.args[1:], keywords=node.keywords)
        ast.copy_location(applied, node)
        applied.end_lineno, applied.end_col_offset = node.end_lineno, node.end_col_offset
        yield from _check_call(applied, path, lines, names, entries)
        return
    for name, entry in entries.matching(candidates):
        deciding: list[ast.AST] = [node.func]
        if not all(_holds(c, _argument(node, c), names, deciding) for c in entry.when):
            continue
        if any(n in lines for part in deciding for n in span(part)):
            yield _finding(entry, f"{name}()", path, node.lineno)
            return


def _check_assignment(
    node: ast.Assign | ast.AnnAssign, path: str, lines: frozenset[int], names: Names, entries: _EntryTable
) -> Iterator[Finding]:
    targets = node.targets if isinstance(node, ast.Assign) else [node.target]
    assert node.value is not None
    for target in targets:
        candidates = [canonical(n) for n in resolve(target, names)] if isinstance(target, ast.Attribute) else []
        for name, entry in entries.matching(candidates):
            deciding: list[ast.AST] = [target]
            if not all(_holds(c, node.value, names, deciding) for c in entry.when):
                continue
            if any(n in lines for part in deciding for n in span(part)):
                yield _finding(entry, f"assignment to {name}", path, node.lineno)
                return


def _finding(entry: Entry, what: str, path: str, line: int) -> Finding:
    cwe = f" ({entry.cwe})" if entry.cwe else ""
    return Finding(
        RULE_ID,
        "block",
        f"{what}: {entry.why}{cwe}",
        path=path,
        line=line,
        details={"cwe": entry.cwe, "entry": entry.target, "doc": entry.doc},
    )


_PARTIALS = ("functools.partial", "functools.partialmethod")
# Shells and the option that makes them run their next argument as a command line (sh, bash, ... -c;
# cmd.exe /c; PowerShell -Command), common practice.
_SHELLS = frozenset({"sh", "bash", "dash", "zsh", "ksh", "csh", "tcsh", "fish", "ash", "busybox", "cmd", "cmd.exe"})
_SHELLS |= {"powershell", "powershell.exe", "pwsh"}
_SHELL_COMMAND_FLAGS = frozenset({"-c", "/c", "/C", "-Command", "-command", "-lc", "-ic", "-ec", "-ce"})
# Modules whose functions turn data into code or commands: reaching into them by a computed name hides which
# function runs, so the rule cannot tell it safe.
GUARDED_MODULES = frozenset(
    {"os", "subprocess", "builtins", "pickle", "marshal", "shelve", "importlib", "ctypes", "pty", "runpy", "sys"}
)


def hidden_calls(module: ModuleIndex, path: str, lines: frozenset[int], calls: _EntryTable) -> Iterator[Finding]:
    """What hides a dangerous call from the entries: a shell run from an argument list (``["sh", "-c", cmd]``,
    in any call or list), a guarded module reached by a computed name (``getattr(os, name)``, ``vars(os)``,
    ``os.__dict__``, ``sys.modules[name]``, ``__builtins__[name]``), and an entry's function passed on as a
    value (``map(eval, rows)``, ``callback=os.system``), which the entry can no longer see called."""
    names = module.names
    not_values = {id(call.func) for call in module.calls}  # called where the entries see the arguments
    not_values |= {id(a.value) for a in module.assignments if isinstance(a.value, (ast.Name, ast.Attribute))}
    for node in walk(module.tree):
        if not isinstance(node, (ast.List, ast.Tuple, ast.Call, ast.Attribute, ast.Subscript, ast.Name)):
            continue
        if not any(n in lines for n in span(node)):
            continue
        if isinstance(node, (ast.List, ast.Tuple, ast.Call)) and _runs_a_shell(node):
            yield _hidden(path, node.lineno, "a shell run from an argument list (sh -c ...)", "CWE-78", _SHELL_DOC)
            continue
        dynamic = _dynamic_access(node, names)
        if dynamic:
            yield _hidden(path, node.lineno, f"{dynamic}: the gate cannot see which function it reaches", "CWE-470")
            continue
        if isinstance(node, (ast.Name, ast.Attribute)) and id(node) not in not_values:
            yield from _passed_as_value(node, names, path, calls)


def _runs_a_shell(node: ast.List | ast.Tuple | ast.Call) -> bool:
    items = node.elts if isinstance(node, (ast.List, ast.Tuple)) else node.args
    texts = [constant_string(item) for item in items]
    for first, second in itertools.pairwise(texts):
        if (
            first is not None
            and second in _SHELL_COMMAND_FLAGS
            and first.replace("\\", "/").rsplit("/", 1)[-1] in _SHELLS
        ):
            return True
    return False


def _dynamic_access(node: ast.AST, names: Names) -> str:
    """How ``node`` reaches into a guarded module by a name the source does not fix, or ''."""
    if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and "getattr" in resolve(node.func, names):
        if len(node.args) >= 2 and constant_string(node.args[1]) is None:
            target = _guarded(resolve(node.args[0], names))
            return f"getattr on {target} with a computed name" if target else ""
        return ""
    if _module_by_computed_name(node, names):
        return "a module taken from sys.modules by a computed name"
    namespace = namespace_of(node, names) if isinstance(node, (ast.Call, ast.Attribute, ast.Name)) else None
    if namespace is None:
        return ""
    if namespace == ("",):  # sys.modules: only a computed module name hides anything
        return ""
    target = _guarded(namespace)
    if not target or (namespace == ("builtins",) and isinstance(node, ast.Name)):
        return ""
    return f"the namespace of {target} read as a mapping ({ast.unparse(node)})"


def _module_by_computed_name(node: ast.AST, names: Names) -> bool:
    """``sys.modules[name]`` or ``sys.modules.get(name)`` with a name the source does not fix."""
    if isinstance(node, ast.Subscript):
        return namespace_of(node.value, names) == ("",) and constant_string(node.slice) is None
    if isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute) and node.func.attr == "get":
        computed = not node.args or constant_string(node.args[0]) is None
        return computed and namespace_of(node.func.value, names) == ("",)
    return False


def _guarded(meanings: Sequence[str]) -> str:
    """The guarded module among ``meanings`` (the module itself, not an object it holds), or ''."""
    return next((m for m in meanings if canonical(m) in GUARDED_MODULES or m == "builtins"), "")


def _passed_as_value(node: ast.Name | ast.Attribute, names: Names, path: str, calls: _EntryTable) -> Iterator[Finding]:
    if isinstance(node.ctx, (ast.Store, ast.Del)):
        return
    candidates = tuple(canonical(n) for n in resolve(node, names))
    for name, entry in calls.matching(candidates):
        if any(char in entry.target for char in "*?["):
            continue  # a pattern entry (subprocess.*) decides by the arguments of a call it sees
        yield _hidden(path, node.lineno, f"{name} passed as a value: {entry.why}", entry.cwe, entry.doc)
        return


def _hidden(path: str, line: int, what: str, cwe: str | None, doc: str = "") -> Finding:
    """A finding for a call the entries cannot see (it has no entry of its own)."""
    return Finding(
        RULE_ID,
        "block",
        f"{what} ({cwe})" if cwe else what,
        path=path,
        line=line,
        details={"cwe": cwe, "entry": "(hidden)", "doc": doc or _IMPORT_DOC},
    )


_MISSING = object()  # the argument is definitely not passed
_HIDDEN = object()  # the argument may be inside *args or **kwargs


def _argument(call: ast.Call, condition: Condition) -> Any:
    """The expression passed for the condition's argument, or _MISSING, or _HIDDEN."""
    if condition.keyword is not None:
        for keyword in call.keywords:
            if keyword.arg == condition.keyword:
                return keyword.value
    if condition.arg is not None:
        for index, arg in enumerate(call.args):
            if isinstance(arg, ast.Starred):
                return _HIDDEN
            if index == condition.arg:
                return arg
    if any(keyword.arg is None for keyword in call.keywords):
        return _HIDDEN
    return _MISSING


def _holds(condition: Condition, value: Any, names: Names, deciding: list[ast.AST]) -> bool:
    """Does the condition hold for ``value``? Adds the argument to ``deciding`` when it does."""
    if value is _HIDDEN:
        return condition.test in _DANGER_WHEN_UNKNOWN
    if value is _MISSING:
        return condition.test in ("missing", "not-in")
    deciding.append(value)
    return _test(condition, value, names)


def _test(condition: Condition, value: ast.expr, names: Names) -> bool:
    falsy = isinstance(value, ast.Constant) and not value.value
    tests = {
        "literal": lambda: is_literal(value),
        "non-literal": lambda: not is_literal(value),
        "true": lambda: isinstance(value, ast.Constant) and bool(value.value),
        "false": lambda: falsy,
        "not-false": lambda: not falsy,
        "present": lambda: True,
        "missing": lambda: False,
        "in": lambda: _is_one_of(value, condition.values, names),
        "not-in": lambda: not _is_one_of(value, condition.values, names),
    }
    return tests[condition.test]()


def _is_one_of(value: ast.expr, allowed: Sequence[str], names: Names) -> bool:
    if isinstance(value, ast.Constant):
        return isinstance(value.value, str) and value.value in allowed
    meanings = [canonical(n) for n in resolve(value, names)]
    return bool(meanings) and all(m in allowed for m in meanings)
