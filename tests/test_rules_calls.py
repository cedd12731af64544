"""calls.banned on real machine-written commits: aliases, chains, argument conditions, human lines ignored."""

from __future__ import annotations

import importlib
import re

import pytest
from conftest import machine
from test_rules_support import context_for, findings, machine_change

from verifier.demo.scratch import ScratchRepo
from verifier.rules.calls import DEFAULT_ENTRIES, entry_problems, parse_entry

# case name -> (module source, the (line, CWE) pairs calls.banned must report)
CASES: dict[str, tuple[str, list[tuple[int, str]]]] = {
    "eval of a parameter": ("def f(text):\n    return eval(text)\n", [(2, "CWE-95")]),
    "eval of a literal": ("x = eval('1 + 2')\n", []),
    "exec of an f-string": ("def f(n):\n    exec(f'x = {n}')\n", [(2, "CWE-95")]),
    "exec of a plain f-string": ("exec(f'x = 1')\n", []),
    "compile by keyword": ("def f(s):\n    return compile(source=s, filename='<s>', mode='exec')\n", [(2, "CWE-95")]),
    "compile of concatenated literals": ("code = compile('a' + '= 1', '<s>', 'exec')\n", []),
    "builtins.eval": ("import builtins\ndef f(s):\n    return builtins.eval(s)\n", [(3, "CWE-95")]),
    "eval shadowed by a local def": ("def eval(s):\n    return s\nprint(eval(input()))\n", []),
    "os alias": ("import os as o\ndef f(c):\n    o.system(c)\n", [(3, "CWE-78")]),
    "from-import alias": ("from os import system as run\nrun('ls')\n", [(2, "CWE-78")]),
    "os.popen literal still a shell": ("import os\nos.popen('ls')\n", [(2, "CWE-78")]),
    "star import": ("from os import *\nsystem('ls')\n", [(2, "CWE-78")]),
    "assigned alias": ("import subprocess\nsh = subprocess.Popen\nsh('ls', shell=True)\n", [(3, "CWE-78")]),
    "getattr with a literal name": ("import os\ngetattr(os, 'system')('ls')\n", [(2, "CWE-78")]),
    "subprocess shell=True": ("import subprocess as sp\nsp.run('ls -l', shell=True)\n", [(2, "CWE-78")]),
    "subprocess shell from a variable": (
        "import subprocess\ndef f(c, s):\n    subprocess.call(c, shell=s)\n",
        [(3, "CWE-78")],
    ),
    "subprocess list without a shell": ("import subprocess\nsubprocess.run(['ls', '-l'], check=True)\n", []),
    "subprocess shell=False": ("import subprocess\nsubprocess.run('ls', shell=False)\n", []),
    "subprocess getoutput": ("from subprocess import getoutput\ngetoutput('ls')\n", [(2, "CWE-78")]),
    "call inside a lambda": ("import os\nrun = lambda c: os.system(c)\n", [(2, "CWE-78")]),
    "call inside a comprehension": (
        "import pickle\ndef f(blobs):\n    return [pickle.loads(b) for b in blobs]\n",
        [(3, "CWE-502")],
    ),
    "pickle alias": ("import pickle as pk\ndef f(b):\n    return pk.loads(b)\n", [(3, "CWE-502")]),
    "marshal": ("import marshal\ndef f(b):\n    return marshal.loads(b)\n", [(3, "CWE-502")]),
    "shelve": ("import shelve\ndb = shelve.open('cache')\n", [(2, "CWE-502")]),
    "nested attribute chain": (
        "import xml\nimport os.path\nos.path.join('a', 'b')\nimport os\nos.system('x')\n",
        [(5, "CWE-78")],
    ),
    "yaml.load without Loader": ("import yaml\ndef f(t):\n    return yaml.load(t)\n", [(3, "CWE-502")]),
    "yaml.load with the full Loader": (
        "import yaml\ndef f(t):\n    return yaml.load(t, Loader=yaml.Loader)\n",
        [(3, "CWE-502")],
    ),
    "yaml.load with SafeLoader": ("import yaml\ndef f(t):\n    return yaml.load(t, Loader=yaml.SafeLoader)\n", []),
    "yaml.load with imported SafeLoader": (
        "from yaml import load, SafeLoader\ndef f(t):\n    return load(t, SafeLoader)\n",
        [],
    ),
    "yaml.load with **kwargs": ("import yaml\ndef f(t, **kw):\n    return yaml.load(t, **kw)\n", [(3, "CWE-502")]),
    "yaml.safe_load": ("import yaml\ndef f(t):\n    return yaml.safe_load(t)\n", []),
    "tempfile.mktemp": ("import tempfile\nname = tempfile.mktemp()\n", [(2, "CWE-377")]),
    "tempfile.mkstemp": ("import tempfile\nfd, name = tempfile.mkstemp()\n", []),
    "requests verify=False": ("import requests\nrequests.get('https://q.example', verify=False)\n", [(2, "CWE-295")]),
    "session verify=False": ("def f(session):\n    return session.post('u', verify=False)\n", [(2, "CWE-295")]),
    "requests verified": ("import requests\nrequests.get('https://q.example', verify=True)\n", []),
    "unverified ssl context": ("import ssl\nctx = ssl._create_unverified_context()\n", [(2, "CWE-295")]),
    "check_hostname off": (
        "import ssl\nctx = ssl.create_default_context()\nctx.check_hostname = False\n",
        [(3, "CWE-295")],
    ),
    "verify_mode CERT_NONE": ("import ssl\ndef f(ctx):\n    ctx.verify_mode = ssl.CERT_NONE\n", [(3, "CWE-295")]),
    "default https context replaced": (
        "import ssl\nssl._create_default_https_context = ssl._create_unverified_context\n",
        [(2, "CWE-295")],
    ),
    "import_module of a variable": (
        "import importlib\ndef f(n):\n    return importlib.import_module(n)\n",
        [(3, "CWE-470")],
    ),
    "import_module of a literal": ("import importlib\nm = importlib.import_module('json')\n", []),
    "__import__ of a variable": ("def f(n):\n    return __import__(n)\n", [(2, "CWE-470")]),
    "shell=True on a continuation line": (
        "import subprocess\nsubprocess.run(\n    'ls',\n    shell=True,\n)\n",
        [(2, "CWE-78")],
    ),
    # issue 16: dangerous calls hidden behind dynamic access, partial application, argument lists, values
    "getattr with a concatenated name": ("import os\ngetattr(os, 'sys' + 'tem')('ls')\n", [(2, "CWE-78")]),
    "getattr with a computed name": (
        "import os\ndef f(name, c):\n    return getattr(os, name)(c)\n",
        [(3, "CWE-470")],
    ),
    "vars of os": ("import os\ndef f(c):\n    vars(os)['sys' 'tem'](c)\n", [(3, "CWE-78")]),
    "vars of os by a computed key": ("import os\ndef f(k, c):\n    vars(os)[k](c)\n", [(3, "CWE-470")]),
    "os.__dict__": ("import os\nrun = os.__dict__.get('system')\nrun('ls')\n", [(2, "CWE-470"), (3, "CWE-78")]),
    "os.__dict__ read whole": ("import os\ntable = dict(os.__dict__)\n", [(2, "CWE-470")]),
    "sys.modules of os": ("import sys\ndef f(c):\n    sys.modules['os'].system(c)\n", [(3, "CWE-78")]),
    "sys.modules by a computed name": (
        "import sys\ndef f(m, c):\n    getattr(sys.modules[m], 'system')(c)\n",
        [(3, "CWE-470")],
    ),
    "builtins.__dict__ eval": (
        "import builtins\ndef f(s):\n    return builtins.__dict__['eval'](s)\n",
        [(3, "CWE-95")],
    ),
    "__builtins__ mapping": ("def f(s):\n    return __builtins__['ev' + 'al'](s)\n", [(2, "CWE-95")]),
    "import_module of os, literal": (
        "import importlib\ndef f(c):\n    importlib.import_module('os').system(c)\n",
        [(3, "CWE-78")],
    ),
    "posix.system": ("import posix\nposix.system('ls')\n", [(2, "CWE-78")]),
    "partial of subprocess.run with shell": (
        "import functools, subprocess\nrun = functools.partial(subprocess.run, shell=True)\n",
        [(2, "CWE-78")],
    ),
    "partial of os.system": (
        "from functools import partial\nimport os\nrun = partial(os.system, 'ls')\n",
        [(3, "CWE-78")],
    ),
    "partial of subprocess.run without a shell": (
        "import functools, subprocess\nrun = functools.partial(subprocess.run, check=True)\n",
        [],
    ),
    "sh -c list": ("import subprocess\ndef f(c):\n    subprocess.run(['sh', '-c', c])\n", [(3, "CWE-78")]),
    "bash -c list in a variable": ("def f(c):\n    argv = ['/bin/bash', '-c', c]\n    return argv\n", [(2, "CWE-78")]),
    "exec family with a shell": ("import os\ndef f(c):\n    os.execl('/bin/sh', 'sh', '-c', c)\n", [(3, "CWE-78")]),
    "execv with sh -c": ("import os\ndef f(c):\n    os.execv('/bin/sh', ['sh', '-c', c])\n", [(3, "CWE-78")]),
    "exec family without a shell": ("import os\ndef f(p):\n    os.execv('/usr/bin/git', ['git', 'status', p])\n", []),
    "eval passed as a value": ("def f(rows):\n    return list(map(eval, rows))\n", [(2, "CWE-95")]),
    "os.system as a callback": ("import os\ndef f(run=os.system):\n    return run\n", [(2, "CWE-78")]),
    "subprocess.run passed as a value": ("import subprocess\ndef f(runner=subprocess.run):\n    return runner\n", []),
    "getattr with a literal default": ("import os\nflag = getattr(os, 'O_BINARY', 0)\n", []),
    "getattr on an object a module holds": ("import sys\ndef f(name):\n    return getattr(sys.stdout, name)\n", []),
    "vars of a local object": ("def f(obj):\n    return vars(obj)['name']\n", []),
    "ordinary git call": ("import subprocess\nout = subprocess.run(['git', 'log', '-c'], capture_output=True)\n", []),
}


@pytest.fixture(scope="module")
def corpus(tmp_path_factory: pytest.TempPathFactory) -> dict[str, list[tuple[int, str]]]:
    """Every case as its own file of one machine-written commit; the findings of calls.banned per file."""
    repo = ScratchRepo(tmp_path_factory.mktemp("calls") / "repo")
    repo.commit("Start", {"README.md": "parcelkit\n"})
    files = {f"parcelkit/case_{index}.py": source for index, (source, _) in enumerate(CASES.values())}
    sha = repo.commit(machine("Add the cases"), files)
    found: dict[str, list[tuple[int, str]]] = {path: [] for path in files}
    for finding in findings("calls.banned", context_for(repo, sha)):
        assert finding.path is not None and finding.line is not None
        found[finding.path].append((finding.line, finding.details["cwe"]))
    return found


@pytest.mark.parametrize("name", list(CASES))
def test_corpus_case(corpus: dict[str, list[tuple[int, str]]], name: str) -> None:
    index = list(CASES).index(name)
    assert sorted(corpus[f"parcelkit/case_{index}.py"]) == CASES[name][1]


def test_human_lines_are_ignored(repo: ScratchRepo) -> None:
    base = {"parcelkit/shell.py": "import os\n\n\ndef run(command):\n    os.system(command)\n"}
    context = machine_change(repo, base, {"parcelkit/shell.py": base["parcelkit/shell.py"] + "\n\nVERSION = 2\n"})
    assert context.provenance.machine_lines == {"parcelkit/shell.py": (6, 7, 8)}  # git's diff: the 3 added lines
    assert findings("calls.banned", context) == []


def test_human_commit_after_the_machine_makes_the_line_human(repo: ScratchRepo) -> None:
    start = repo.commit("Start", {"parcelkit/__init__.py": ""})
    repo.commit(machine("Add a runner"), {"parcelkit/run.py": "import os\nos.system('a')\n"})
    repo.commit("Reviewed by a person", {"parcelkit/run.py": "import os\nos.system('b')\n"})
    found = findings("calls.banned", context_for(repo, f"{start}..HEAD"))
    assert found == []  # git blame gives line 2 to the human commit; line 1 (the import) is not a call


def test_machine_argument_in_a_human_call_counts(repo: ScratchRepo) -> None:
    base = {"parcelkit/run.py": "import subprocess\nsubprocess.run(\n    'ls',\n)\n"}
    context = machine_change(
        repo, base, {"parcelkit/run.py": "import subprocess\nsubprocess.run(\n    'ls',\n    shell=True,\n)\n"}
    )
    found = findings("calls.banned", context)
    assert [(f.line, f.details["cwe"]) for f in found] == [(2, "CWE-78")]


def test_team_entry_with_an_argument_condition(repo: ScratchRepo) -> None:
    entry = {
        "call": "parcelkit.db.raw_sql",
        "when": {"arg": 0, "keyword": "sql", "is": "non-literal"},
        "cwe": "CWE-89",
        "why": "raw SQL built at run time",
    }
    source = (
        "from parcelkit import db as store\n"
        "def rows(table):\n"
        "    store.raw_sql('select 1')\n"
        "    return store.raw_sql(f'select * from {table}')\n"
    )
    context = machine_change(repo, None, {"parcelkit/q.py": source}, options={"calls.banned": {"entries": [entry]}})
    found = findings("calls.banned", context)
    assert [(f.line, f.details["cwe"]) for f in found] == [(4, "CWE-89")]
    assert "raw SQL built at run time" in found[0].message


def test_ignore_drops_a_default_entry(repo: ScratchRepo) -> None:
    context = machine_change(
        repo,
        None,
        {"tools/tmp.py": "import tempfile\nname = tempfile.mktemp()\n"},
        options={"calls.banned": {"ignore": ["tempfile.*"]}},
    )
    assert findings("calls.banned", context) == []


def test_invalid_team_entry_is_an_error_not_a_crash(repo: ScratchRepo) -> None:
    bad = {"call": "x.y", "when": {"arg": -1, "is": "sometimes"}}
    context = machine_change(repo, None, {"a.py": "x = 1\n"}, options={"calls.banned": {"entries": [bad]}})
    found = findings("calls.banned", context)
    assert [f.severity for f in found] == ["error"]
    message = found[0].message
    assert "entries[0]" in message and "'why'" in message and "'is' must be one of" in message


@pytest.mark.parametrize(
    ("entry", "problem"),
    [
        ({"why": "w"}, "exactly one of 'call' or 'assign'"),
        ({"call": "a.b", "assign": "c", "why": "w"}, "exactly one of 'call' or 'assign'"),
        ({"call": "a.b", "why": "w", "cwe": "89"}, "'cwe' must look like CWE-89"),
        ({"call": "a.b", "why": "w", "when": {"is": "literal"}}, "needs 'arg' and/or 'keyword'"),
        ({"assign": "*.x", "why": "w", "when": {"arg": 0, "is": "true"}}, "no 'arg' or 'keyword'"),
        ({"call": "a.b", "why": "w", "when": {"arg": 0, "in": "yaml.SafeLoader"}}, "must be a list"),
        ({"call": "a.b", "why": "w", "colour": "red"}, "unknown key 'colour'"),
        ("a.b", "must be a mapping"),
    ],
)
def test_entry_syntax_problems(entry: object, problem: str) -> None:
    assert any(problem in p for p in entry_problems(entry)), entry_problems(entry)


def test_every_default_entry_is_valid() -> None:
    for entry in DEFAULT_ENTRIES:
        assert entry_problems(entry) == [], entry
        parse_entry(entry)


# Each weakness, and the CWE that names it. The names are written from memory of the CWE list
# (cwe.mitre.org); the test pins the mapping so a typo in an id (say CWE-59 for CWE-95) fails.
CWE_NAMES = {
    "CWE-95": "Improper Neutralization of Directives in Dynamically Evaluated Code ('Eval Injection')",
    "CWE-78": "Improper Neutralization of Special Elements used in an OS Command ('OS Command Injection')",
    "CWE-502": "Deserialization of Untrusted Data",
    "CWE-377": "Insecure Temporary File",
    "CWE-295": "Improper Certificate Validation",
    "CWE-470": "Use of Externally-Controlled Input to Select Classes or Code ('Unsafe Reflection')",
}
WEAKNESS_OF = {
    "eval": "CWE-95",
    "exec": "CWE-95",
    "compile": "CWE-95",
    "os.system": "CWE-78",
    "os.popen": "CWE-78",
    "subprocess.getoutput": "CWE-78",
    "subprocess.getstatusoutput": "CWE-78",
    "asyncio.create_subprocess_shell": "CWE-78",
    "subprocess.*": "CWE-78",
    "pickle.load": "CWE-502",
    "pickle.loads": "CWE-502",
    "pickle.Unpickler": "CWE-502",
    "marshal.load": "CWE-502",
    "marshal.loads": "CWE-502",
    "shelve.open": "CWE-502",
    "yaml.load": "CWE-502",
    "yaml.load_all": "CWE-502",
    "yaml.unsafe_load": "CWE-502",
    "yaml.unsafe_load_all": "CWE-502",
    "tempfile.mktemp": "CWE-377",
    "*": "CWE-295",
    "ssl._create_unverified_context": "CWE-295",
    "ssl._create_default_https_context": "CWE-295",
    "*.check_hostname": "CWE-295",
    "*.verify_mode": "CWE-295",
    "*.verify": "CWE-295",
    "__import__": "CWE-470",
    "importlib.import_module": "CWE-470",
}


def test_default_entries_cite_the_right_cwe_and_a_documentation_page() -> None:
    for entry in DEFAULT_ENTRIES:
        target = entry.get("call") or entry["assign"]
        assert re.fullmatch(r"CWE-[1-9][0-9]*", entry["cwe"]), entry
        assert entry["cwe"] == WEAKNESS_OF[target], target
        assert entry["cwe"] in CWE_NAMES
        assert entry["doc"].startswith(("Python docs, ", "PyYAML documentation, ")), target
    assert set(WEAKNESS_OF) == {e.get("call") or e["assign"] for e in DEFAULT_ENTRIES}


def test_default_names_exist_in_python_itself() -> None:
    """Checked against the running interpreter (and PyYAML, a dependency): every named function exists,
    so no default entry guards a misspelt name that can never match."""
    for entry in DEFAULT_ENTRIES:
        target = entry.get("call") or entry["assign"]
        if "*" in target:
            continue
        module_name, _, attribute = target.rpartition(".")
        module = importlib.import_module(module_name or "builtins")
        assert hasattr(module, attribute), target
