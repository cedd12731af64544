"""Selection under the shipped default policy, end to end: real git, the real CLI, pytest and coverage.py
in the sandbox. The library below has no verifier.yaml, so every check here is judged by
policies/default.yaml. The expected selections are derived by hand from which test calls what.

Each case also tries the wrong change an assistant could hope to slip past the selection (a change in a
function reached only dynamically, a fixture, a data file): it must end with exit 1 (block).
"""

from __future__ import annotations

from conftest import failed, machine, ran, report_of, run_check

from verifier.demo.scratch import ScratchRepo

RATES = '''\
"""Parcel rates of Quillfeather Logistics."""
import json
from pathlib import Path

BASE = 4


class Tariff:
    def __init__(self, rate):
        self.rate = rate

    def price(self, weight):
        return weight * self.rate

    def describe(self):
        return f"{self.rate}/kg"


def base_rate(weight):
    if weight > 10:
        return BASE + 2
    return BASE


def surcharge(zone):
    return 3 if zone == "remote" else 0


def zone_table(path):
    return json.loads(Path(path).read_text())
'''
HIDDEN = "def secret_total(a, b):\n    return a + b\n"
LIBRARY = {
    "src/parcelkit/__init__.py": "",
    "src/parcelkit/rates.py": RATES,
    "src/parcelkit/hidden.py": HIDDEN,
    "tests/conftest.py": "import pytest\n\n\n@pytest.fixture\ndef heavy_weight():\n    return 11\n",
    "tests/data/zones.json": '{"remote": 3}\n',
    "tests/test_rates.py": "import pytest\n\nfrom parcelkit.rates import base_rate, surcharge\n\n\n"
    "def test_light():\n    assert base_rate(1) == 4\n\n\n"
    "def test_heavy(heavy_weight):\n    assert base_rate(heavy_weight) == 6\n\n\n"
    'def test_remote():\n    assert surcharge("remote") == 3\n\n\n'
    '@pytest.mark.parametrize("weight", range(30))\ndef test_many(weight):\n    assert base_rate(weight) >= 4\n',
    "tests/test_tariff.py": "from parcelkit.rates import Tariff\n\n\n"
    "def test_price():\n    assert Tariff(2).price(3) == 6\n\n\n"
    'def test_describe():\n    assert Tariff(2).describe() == "2/kg"\n',
    "tests/test_zones.py": "from pathlib import Path\n\nfrom parcelkit.rates import zone_table\n\n\n"
    'def test_zone_table():\n    assert zone_table(Path(__file__).parent / "data" / "zones.json")["remote"] == 3\n',
    # reaches secret_total only through import_module and getattr with built names: no import, no mention
    "tests/test_dynamic.py": "import importlib\n\n\n"
    'def test_hidden():\n    module = importlib.import_module("parcelkit." + "hid" + "den")\n'
    '    assert getattr(module, "secret_" + "total")(2, 3) == 5\n',
}
LIGHT, HEAVY, REMOTE = (f"tests/test_rates.py::test_{name}" for name in ("light", "heavy", "remote"))
MANY = tuple(f"tests/test_rates.py::test_many[{n}]" for n in range(30))
PRICE, DESCRIBE = "tests/test_tariff.py::test_price", "tests/test_tariff.py::test_describe"
ZONES, HIDDEN_TEST = "tests/test_zones.py::test_zone_table", "tests/test_dynamic.py::test_hidden"
EVERY_TEST = {LIGHT, HEAVY, REMOTE, *MANY, PRICE, DESCRIBE, ZONES, HIDDEN_TEST}


def library(repo: ScratchRepo) -> None:
    repo.commit("parcelkit rates, tariffs and zones", LIBRARY)


def test_the_default_policy_runs_only_the_tests_of_the_changed_function_and_a_wrong_change_still_fails(repo):
    library(repo)
    honest = RATES.replace('return 3 if zone == "remote" else 0', 'return 3 if zone in ("remote",) else 0')
    repo.commit(machine("Zones as a tuple"), {"src/parcelkit/rates.py": honest})
    out = run_check(repo, "HEAD")
    assert out.code == 0, out.stdout + out.stderr
    selection = report_of(out)["selection"]
    assert selection["whole_suite"] is False and selection["map"] == "built"
    assert set(selection["selected"]) == {REMOTE}  # only test_remote calls surcharge()
    assert ran(out) == {REMOTE}
    assert (selection["known_tests"], selection["left_out"]) == (len(EVERY_TEST), len(EVERY_TEST) - 1)
    assert "  1 test: ran parcelkit.rates.surcharge, which the change modifies" in out.stdout

    wrong = RATES.replace('return 3 if zone == "remote" else 0', 'return 4 if zone == "remote" else 0')
    repo.commit(machine("Remote zones cost four"), {"src/parcelkit/rates.py": wrong})
    out = run_check(repo, "HEAD")
    assert report_of(out)["selection"]["map"] == "updated"  # a new base, one commit past the mapped one
    assert ran(out) == {REMOTE} and failed(out) == {REMOTE}
    assert out.code == 1 and report_of(out)["verdict"] == "block"


def test_adding_a_method_selects_the_tests_of_its_class_not_every_importer(repo):
    library(repo)
    head = RATES.replace(
        "    def describe(self):",
        "    def weight_limit(self):\n        return 30 * self.rate\n\n    def describe(self):",
    )
    new_test = (
        "from parcelkit.rates import Tariff\n\n\ndef test_weight_limit():\n    assert Tariff(2).weight_limit() == 60\n"
    )
    repo.commit(
        machine("A weight limit per tariff"), {"src/parcelkit/rates.py": head, "tests/test_limits.py": new_test}
    )
    out = run_check(repo, "HEAD")
    assert out.code == 0, out.stdout + out.stderr
    selected = report_of(out)["selection"]["selected"]
    # test_price and test_describe ran Tariff's methods; test_limits.py is new; nothing else can reach the method
    assert set(selected) == {PRICE, DESCRIBE, "tests/test_limits.py"}
    assert selected[PRICE] == ["ran parcelkit.rates.Tariff, which gets the new method weight_limit"]
    assert ran(out) == {PRICE, DESCRIBE, "tests/test_limits.py::test_weight_limit"}


def test_a_module_level_change_is_reported_in_groups_not_one_line_per_test(repo):
    library(repo)
    repo.commit(
        machine("Spell out the base rate"), {"src/parcelkit/rates.py": RATES.replace("BASE = 4", "BASE = 2 + 2")}
    )
    out = run_check(repo, "HEAD")
    assert out.code == 0, out.stdout + out.stderr
    selected = report_of(out)["selection"]["selected"]
    assert set(MANY) <= set(selected)  # the JSON report keeps every test and its reasons
    assert "tests: ran parcelkit.rates, whose module-level code changes" in out.stdout
    assert "test_many[" not in out.stdout  # the text report does not list the tests one by one
    rows = [row for row in out.stdout.splitlines() if row.startswith("  ") and ": " in row and "test" in row]
    assert len(rows) <= 9


def test_a_fixture_change_in_conftest_runs_every_test_and_is_caught(repo):
    library(repo)
    repo.commit(
        machine("Lighter default parcel"),
        {"tests/conftest.py": "import pytest\n\n\n@pytest.fixture\ndef heavy_weight():\n    return 9\n"},
    )
    out = run_check(repo, "HEAD")
    selection = report_of(out)["selection"]
    assert selection["whole_suite"] is True and "tests/conftest.py" in selection["reason"]
    assert ran(out) == EVERY_TEST
    assert failed(out) == {HEAVY}  # base_rate(9) == 4, not 6
    assert out.code == 1


def test_a_data_file_a_test_reads_runs_every_test_and_is_caught(repo):
    library(repo)
    repo.commit(machine("Remote zones in the table"), {"tests/data/zones.json": '{"remote": 5}\n'})
    out = run_check(repo, "HEAD")
    selection = report_of(out)["selection"]
    assert selection["whole_suite"] is True and "tests/data/zones.json" in selection["reason"]
    assert failed(out) == {ZONES}
    assert out.code == 1


def test_a_function_reached_only_through_getattr_cannot_escape_its_test(repo):
    # The assistant changes a function no test imports or names: only coverage.py's record of the run
    # at base shows that test_hidden executed it.
    library(repo)
    repo.commit(machine("Totals round up"), {"src/parcelkit/hidden.py": HIDDEN.replace("a + b", "a + b + 1")})
    out = run_check(repo, "HEAD")
    assert set(report_of(out)["selection"]["selected"]) == {HIDDEN_TEST}
    assert failed(out) == {HIDDEN_TEST}
    assert out.code == 1 and report_of(out)["verdict"] == "block"


def test_a_new_method_an_existing_getattr_picks_up_cannot_escape_the_tests_of_that_code(repo):
    # describe() looks the method up by name at base; adding it changes describe()'s answer.
    base = RATES.replace(
        '        return f"{self.rate}/kg"',
        '        extra = getattr(self, "disc" + "ount", None)\n'
        '        return f"{self.rate}/kg" if extra is None else f"{self.rate}/kg less {extra()}"',
    )
    repo.commit("parcelkit with a discount hook", {**LIBRARY, "src/parcelkit/rates.py": base})
    head = base.replace(
        "    def describe(self):", "    def discount(self):\n        return 1\n\n    def describe(self):"
    )
    repo.commit(machine("A discount of one"), {"src/parcelkit/rates.py": head})
    out = run_check(repo, "HEAD")
    assert DESCRIBE in report_of(out)["selection"]["selected"]
    assert failed(out) == {DESCRIBE}  # "2/kg less 1" != "2/kg"
    assert out.code == 1


def test_all_tests_and_the_policy_still_ask_for_every_test(repo):
    library(repo)
    honest = RATES.replace('return 3 if zone == "remote" else 0', 'return 3 if zone in ("remote",) else 0')
    repo.commit(machine("Zones as a tuple"), {"src/parcelkit/rates.py": honest})
    out = run_check(repo, "HEAD", "--all-tests")
    assert out.code == 0 and report_of(out)["selection"]["whole_suite"] is True and ran(out) == EVERY_TEST
    repo.commit("Every test on every check", {"verifier.yaml": "selection:\n  run: all\n"})
    repo.commit(machine("Zones as a list"), {"src/parcelkit/rates.py": honest.replace('("remote",)', '["remote"]')})
    out = run_check(repo, "HEAD")
    assert out.code == 0 and "selection.run is 'all'" in report_of(out)["selection"]["reason"]
    assert ran(out) == EVERY_TEST
