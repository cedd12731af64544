"""tamper.means and tamper.hidden-code on real machine-written commits: each means of tampering, its honest
neighbour, and the gate end to end on tests that try to forge their own run."""

from __future__ import annotations

import py_compile
from pathlib import Path

import pytest
from conftest import machine, run_check
from test_rules_support import findings, machine_change

from verifier.demo.scratch import ScratchRepo
from verifier.rules.tampering import _CALLS, _LOADER_CALLS, _harness_dir, means_of

CODE = {"parcelkit/__init__.py": "", "parcelkit/rates.py": "def rate(weight):\n    return 4.5 * weight\n"}

# name -> (source of a machine-written test file, a text the one finding's message holds)
MEANS = {
    "pytest internals": ("from _pytest.reports import TestReport\n", "import of _pytest.reports"),
    "pytest internals, plain import": ("import _pytest.runner as runner\n", "import of _pytest.runner"),
    "coverage internals": ("from coverage.collector import Collector\n", "import of coverage.collector"),
    "coverage itself": ("import coverage\n", "import of coverage"),
    "pluggy": ("import pluggy\n", "import of pluggy"),
    "sys.modules replaced for a tool": (
        "import sys\nsys.modules['coverage'] = None\n",
        "changes sys.modules for a tool's module",
    ),
    "sys.modules cleared": ("import sys\nsys.modules.clear()\n", "sys.modules.clear()"),
    "sys.modules by monkeypatch": (
        "import sys\n\n\ndef test_x(monkeypatch):\n    monkeypatch.setitem(sys.modules, '_pytest.junitxml', None)\n",
        "replaces a tool's module in sys.modules",
    ),
    "gc reaching every object": ("import gc\nobjects = gc.get_objects()\n", "gc.get_objects()"),
    "frames of the callers": ("import sys\ncaller = sys._getframe(1)\n", "sys._getframe()"),
    "frame globals": ("import inspect\n\n\ndef f(frame):\n    return frame.f_back\n", "reads .f_back"),
    "ctypes": ("import ctypes\n", "import of ctypes"),
    "tracer replaced": ("import sys\nsys.settrace(None)\n", "sys.settrace()"),
    "exit handler": ("import atexit\natexit.register(print, 'done')\n", "atexit.register()"),
    "exit handler as a decorator": (
        "import atexit\n\n\n@atexit.register\ndef rewrite():\n    pass\n",
        "atexit.register()",
    ),
    "os._exit": ("import os\n\n\ndef test_x():\n    os._exit(0)\n", "os._exit()"),
    "pytest.exit": ("import pytest\n\n\ndef test_x():\n    pytest.exit('done', returncode=0)\n", "pytest.exit()"),
    "signal to its own pid": ("import os, signal\nos.kill(os.getpid(), signal.SIGKILL)\n", "os.kill()"),
    "signal to the runner": (
        "from os import kill, getppid\nkill(getppid(), 9)\n",
        "os.kill()",
    ),
    "any signal from a test": ("import os\n\n\ndef test_x(pid):\n    os.kill(pid, 15)\n", "os.kill() sends a signal"),
    "exit builtin in a test": ("def test_x():\n    exit(0)\n", "exit() ends the test process"),
    "signal raised": ("import signal\nsignal.raise_signal(signal.SIGTERM)\n", "signal.raise_signal()"),
    "sys.exit in a test": ("import sys\n\n\ndef test_x():\n    sys.exit(0)\n", "sys.exit()"),
    "SystemExit in a test": ("def test_x():\n    raise SystemExit(0)\n", "raises SystemExit"),
    "KeyboardInterrupt": ("def test_x():\n    raise KeyboardInterrupt\n", "raises KeyboardInterrupt"),
    "exec family in a test": ("import os\n\n\ndef test_x():\n    os.execv('/bin/true', ['true'])\n", "os.execv()"),
    "pytest_plugins": ("pytest_plugins = ['parcelkit.quiet_plugin']\n", "pytest_plugins declared"),
    "settings through the environment": (
        "import os\nos.environ['PYTEST_ADDOPTS'] = '-k nothing'\n",
        "sets pytest or coverage settings",
    ),
    "settings through monkeypatch": (
        "def test_x(monkeypatch):\n    monkeypatch.setenv('COVERAGE_FILE', '/tmp/elsewhere')\n",
        "sets pytest or coverage settings",
    ),
    "the harness's folder": (
        f"from pathlib import Path\nPath('{_harness_dir()}/out/results.jsonl').write_text('')\n",
        "names the harness's folder",
    ),
    "coverage's data file": ("import os\nos.remove('.coverage')\n", "names coverage.py's data file (.coverage)"),
    "code object replaced": (
        "def f():\n    pass\n\n\nf.__code__ = (lambda: 1).__code__\n",
        "replaces a function's __code__",
    ),
}

HONEST = {
    "pytest's public API": (
        "import pytest\n\n\ndef test_x(tmp_path, monkeypatch):\n    monkeypatch.setenv('LANG', 'C')\n"
    ),
    "a fake module in sys.modules": (
        "import sys, types\n\n\ndef test_x(monkeypatch):\n"
        "    monkeypatch.setitem(sys.modules, 'parcelkit_fake', types.ModuleType('parcelkit_fake'))\n"
    ),
    "reading sys.modules": "import sys\nloaded = 'json' in sys.modules\n",
    "subprocess used safely": "import subprocess\nout = subprocess.run(['git', 'status'], capture_output=True)\n",
    "an ordinary environment variable": "import os\nos.environ['PARCELKIT_REGION'] = 'north'\n",
    "a coverage-like word": "COVERAGE_NOTE = 'the coverage of zones'\nname = 'parcel.coverage.txt'\n",
    "a signal-free process check": "import os\npid = os.getpid()\n",
    "gc.collect": "import gc\ngc.collect()\n",
}


def tamper_findings(repo: ScratchRepo, source: str, path: str = "tests/test_tamper.py") -> list[str]:
    context = machine_change(repo, CODE, {path: source})
    return [f.message for rule in ("tamper.means", "tamper.hidden-code") for f in findings(rule, context)]


@pytest.mark.parametrize("name", list(MEANS))
def test_means_of_tampering_is_found(repo: ScratchRepo, name: str) -> None:
    source, text = MEANS[name]
    found = tamper_findings(repo, source)
    assert len(found) == 1 and text in found[0], found


@pytest.mark.parametrize("name", list(HONEST))
def test_ordinary_code_is_not_tampering(repo: ScratchRepo, name: str) -> None:
    assert tamper_findings(repo, HONEST[name]) == []


def test_a_signal_to_its_own_run_from_a_program(repo: ScratchRepo) -> None:
    found = tamper_findings(repo, "import os\n\n\ndef stop():\n    os.kill(os.getppid(), 9)\n", "parcelkit/cli.py")
    assert found == ["os.kill() sends a signal to its own process, its parent or its group (the test run)"]


@pytest.mark.parametrize(
    "source",
    [
        "import sys\n\n\ndef main():\n    sys.exit(0)\n",
        "import os, signal\n\n\ndef stop(worker):\n    os.kill(worker.pid, signal.SIGTERM)\n",
        "import signal\n\n\ndef main():\n    signal.signal(signal.SIGINT, signal.SIG_DFL)\n",
    ],
)
def test_process_control_in_a_program_is_ordinary(repo: ScratchRepo, source: str) -> None:
    assert tamper_findings(repo, source, "parcelkit/cli.py") == []
    assert tamper_findings(repo, source, "tests/test_cli.py") != []


def test_means_on_human_lines_are_not_reported(repo: ScratchRepo) -> None:
    base = {**CODE, "tests/test_tamper.py": "import os\n\n\ndef test_x():\n    os._exit(0)\n"}
    context = machine_change(repo, base, {"tests/test_tamper.py": base["tests/test_tamper.py"] + "\nX = 1\n"})
    assert findings("tamper.means", context) == []


def test_every_named_function_exists() -> None:
    """Checked against the running interpreter: each call the rules name exists (no misspelt, dead entry).
    ``imp`` left Python in 3.12 (Python docs, "What's New In Python 3.12"), so it is only checked if present."""
    import importlib
    import warnings

    for dotted in [*_CALLS, *_LOADER_CALLS]:
        module_name, _, attribute = dotted.rpartition(".")
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", DeprecationWarning)  # imp, on the Pythons that still have it
                module = importlib.import_module(module_name)
        except ModuleNotFoundError:
            assert module_name == "imp", dotted
            continue
        assert hasattr(module, attribute), dotted


@pytest.mark.parametrize(
    ("name", "source"),
    [
        ("runpy.run_path", "import runpy\nrunpy.run_path('parcelkit/zones.txt')\n"),
        ("spec_from_file_location", "import importlib.util as u\nspec = u.spec_from_file_location('z', 'z.dat')\n"),
        ("SourcelessFileLoader", "from importlib.machinery import SourcelessFileLoader as L\nL('z', 'z.pyc')\n"),
    ],
)
def test_code_run_through_a_loader_is_hidden_code(repo: ScratchRepo, name: str, source: str) -> None:
    found = findings("tamper.hidden-code", machine_change(repo, CODE, {"parcelkit/loader.py": source}))
    assert [f.line for f in found] == [2] and name in found[0].message


def test_compiled_file_added_by_a_machine_commit(repo: ScratchRepo, tmp_path: Path) -> None:
    source = tmp_path / "zones.py"
    source.write_text("def zone(code):\n    return 'north'\n")
    compiled = Path(py_compile.compile(str(source), cfile=str(tmp_path / "zones.pyc")))  # a real .pyc
    context = machine_change(repo, CODE, {"parcelkit/zones.pyc": compiled.read_bytes()})
    found = findings("tamper.hidden-code", context)
    assert [(f.path, f.message.split(":")[0]) for f in found] == [
        ("parcelkit/zones.pyc", "pyc file added by a machine commit")
    ]


def test_compiled_file_added_by_a_person_is_not_this_rule(repo: ScratchRepo, tmp_path: Path) -> None:
    context = machine_change(repo, CODE, {"parcelkit/zones.pyc": b"\x00binary"}, human=True)
    assert findings("tamper.hidden-code", context) == []


def test_means_of_finds_in_plain_source() -> None:
    assert means_of("import os\nos._exit(3)\n") == [
        "os._exit() ends the process at once, skipping the harness's handlers (the run can look complete)"
    ]


FORGING_TEST = """import atexit
import os

from parcelkit.rates import rate


def test_rate():
    assert rate(2) == 9.0


def _forge():
    os._exit(0)


atexit.register(_forge)
"""


def test_gate_blocks_a_test_that_forges_its_run(repo: ScratchRepo) -> None:
    """End to end: a wrong function with a test file that registers an exit handler ending the process with
    a success code. Whatever the harness makes of the run, the gate must not pass it (exit 1 or 3)."""
    repo.commit(
        "Start parcelkit",
        {
            **CODE,
            "tests/test_rates.py": "from parcelkit.rates import rate\n\n\ndef test_one():\n    assert rate(1) == 4.5\n",
        },
    )
    sha = repo.commit(machine("Add zone pricing"), {"tests/test_zone_rates.py": FORGING_TEST})
    out = run_check(repo, sha)
    assert out.code in (1, 3), out.stdout + out.stderr
    assert out.report is not None and any(f["rule"] == "tamper.means" for f in out.report["findings"])


def test_gate_passes_the_honest_version(repo: ScratchRepo) -> None:
    repo.commit("Start parcelkit", CODE)
    honest = "from parcelkit.rates import rate\n\n\ndef test_rate():\n    assert rate(2) == 9.0\n"
    sha = repo.commit(machine("Test the rate"), {"tests/test_zone_rates.py": honest})
    out = run_check(repo, sha)
    assert out.report is not None, out.stderr
    assert not [f for f in out.report["findings"] if f["rule"].startswith("tamper.")]
    assert out.code == 0, out.report["findings"]
