"""Selection where the who-tests-what map is blind, end to end: real git, the real CLI, pytest and coverage.py
in the sandbox, under the shipped default policy (observed selection).

Both cases were found by benchmarks/bench_selection_safety.py on real libraries, as failures the whole suite
showed and the selection missed:

* a test that only reads a constant of a module it loads by a computed name (``importlib.import_module``):
  coverage.py records no line of that module for the test (another test imported it first) and the static
  import graph saw no import, so a change of the constant left the test out;
* a test that runs the code in a subprocess (``python -m``): coverage.py measures the test's own process
  only, so the map knows the in-process test of the same function and not the one that runs it as a command.

Each case tries the wrong change (it must block, exit 1) and an honest change (it passes, and the
selection still leaves unrelated tests out).
"""

from __future__ import annotations

from conftest import failed, machine, ran, report_of, run_check

from verifier.demo.scratch import ScratchRepo
from verifier.selection.imports import build_graph
from verifier.selection.plan import starts_processes

CARRIER = '"""Swift Couriers, a carrier plugin of Quillfeather Logistics."""\n\nMAX_KG = 30\n\n\n'
CARRIER += "def quote(weight):\n    return 5 + weight\n"
CLI = '''"""parcelkit's command line: ``python -m parcelkit.cli 3 1`` prints how many parcels and the heaviest."""

import sys


def main(argv):
    weights = [int(argument) for argument in argv]
    if not weights:
        return "no parcels"
    return f"{len(weights)} parcels, heaviest {max(weights)}"


if __name__ == "__main__":
    print(main(sys.argv[1:]))
'''
RATES = "def base_rate(weight):\n    if weight > 10:\n        return 6\n    return 4\n"
LIBRARY = {
    "src/parcelkit/__init__.py": "",
    "src/parcelkit/plugins.py": "import importlib\n\n\ndef carrier(name):\n"
    '    return importlib.import_module("parcelkit.carrier_" + name)\n',
    "src/parcelkit/carrier_swift.py": CARRIER,
    "src/parcelkit/cli.py": CLI,
    "src/parcelkit/rates.py": RATES,
    # test_quote runs first and imports the plugin under its own context; test_limit only reads MAX_KG
    "tests/test_carriers.py": "from parcelkit.plugins import carrier\n\n\n"
    'def test_quote():\n    assert carrier("swift").quote(2) == 7\n\n\n'
    'def test_limit():\n    assert carrier("swift").MAX_KG == 30\n',
    "tests/test_cli.py": "import os\nimport subprocess\nimport sys\nfrom pathlib import Path\n\n"
    "import parcelkit\nfrom parcelkit.cli import main\n\n"
    "SOURCES = str(Path(parcelkit.__file__).parent.parent)\n\n\n"
    'def test_main():\n    assert main(["3", "1"]) == "2 parcels, heaviest 3"\n\n\n'
    "def test_command_without_parcels():\n"
    '    command = [sys.executable, "-m", "parcelkit.cli"]\n'
    "    done = subprocess.run(command, capture_output=True, text=True, env=dict(os.environ, PYTHONPATH=SOURCES))\n"
    '    assert done.stdout.strip() == "no parcels", done.stderr\n',
    "tests/test_rates.py": "from parcelkit.rates import base_rate\n\n\n"
    "def test_light():\n    assert base_rate(1) == 4\n\n\ndef test_heavy():\n    assert base_rate(11) == 6\n",
}
QUOTE, LIMIT = "tests/test_carriers.py::test_quote", "tests/test_carriers.py::test_limit"
MAIN, COMMAND = "tests/test_cli.py::test_main", "tests/test_cli.py::test_command_without_parcels"
LIGHT, HEAVY = "tests/test_rates.py::test_light", "tests/test_rates.py::test_heavy"


def library(repo: ScratchRepo) -> None:
    repo.commit("parcelkit carriers, command line and rates", LIBRARY)


def test_a_constant_of_a_module_loaded_by_a_computed_name_cannot_escape_the_test_that_reads_it(repo):
    library(repo)
    honest = CARRIER.replace("MAX_KG = 30", "MAX_KG = 15 * 2")
    repo.commit(machine("Spell out the weight limit"), {"src/parcelkit/carrier_swift.py": honest})
    out = run_check(repo, "HEAD")
    assert out.code == 0, out.stdout + out.stderr
    assert report_of(out)["selection"]["whole_suite"] is False
    assert {QUOTE, LIMIT} <= ran(out) and not {LIGHT, HEAVY} & ran(out)

    wrong = CARRIER.replace("MAX_KG = 30", "MAX_KG = 25")
    repo.commit(machine("Lower the weight limit"), {"src/parcelkit/carrier_swift.py": wrong})
    out = run_check(repo, "HEAD")
    assert "tests/test_carriers.py" in report_of(out)["selection"]["selected"]  # an importer of every file
    assert failed(out) == {LIMIT}
    assert out.code == 1


def test_code_a_test_runs_in_a_subprocess_cannot_escape_that_test(repo):
    library(repo)
    honest = RATES.replace("if weight > 10:", "if weight >= 11:")
    repo.commit(machine("Heavy from eleven kilos"), {"src/parcelkit/rates.py": honest})
    out = run_check(repo, "HEAD")
    assert out.code == 0, out.stdout + out.stderr
    selection = report_of(out)["selection"]
    assert "starts processes, whose code the map cannot see" in selection["selected"]["tests/test_cli.py"]
    assert ran(out) == {LIGHT, HEAVY, MAIN, COMMAND}  # the carriers' tests stay out

    wrong = CLI.replace('return "no parcels"', 'return "nothing"')
    repo.commit(machine("Shorter message"), {"src/parcelkit/cli.py": wrong})
    out = run_check(repo, "HEAD")
    assert failed(out) == {COMMAND}  # test_main ran main() in process; only the command sees the message
    assert out.code == 1


def test_the_graph_counts_a_computed_dynamic_import_as_importing_every_file_and_a_literal_one_as_its_target():
    # importlib.import_module's argument is a module name (Python's docs, "importlib.import_module").
    graph = build_graph(
        {
            "pkg/loader.py": "import importlib\n\n\ndef load(name):\n"
            "    return importlib.import_module('pkg.' + name)\n",
            "pkg/test_loader.py": "from pkg.loader import load\n",
            "pkg/fixed.py": "import importlib\n\nPLUGIN = importlib.import_module('pkg.alpha')\n",
            "pkg/alpha.py": "A = 1\n",
            "pkg/beta.py": "B = 2\n",
        }
    )
    assert graph.importers(["pkg/beta.py"]) == {"pkg/loader.py", "pkg/test_loader.py"}
    assert graph.importers(["pkg/alpha.py"]) == {"pkg/loader.py", "pkg/test_loader.py", "pkg/fixed.py"}
    assert graph.importers(["pkg/test_loader.py"]) == set()  # pytest loads test modules; no loader does


def test_what_counts_as_starting_a_process():
    # The process-starting interfaces of Python's standard library (Python's docs: subprocess,
    # multiprocessing, os "Process Management", asyncio "Subprocesses"); sys.executable names Python again.
    assert starts_processes("import subprocess\n")
    assert starts_processes("from multiprocessing import Pool\n")
    assert starts_processes("import os\n\nos.system('true')\n")
    assert starts_processes("import sys\n\nCOMMAND = [sys.executable, '-m', 'parcelkit.cli']\n")
    assert starts_processes("import asyncio\n\nasyncio.create_subprocess_exec('true')\n")
    assert not starts_processes("import os\n\nHERE = os.path.dirname(__file__)\n")
    assert not starts_processes("from parcelkit.cli import main\n\n\ndef test_main():\n    assert main([])\n")
