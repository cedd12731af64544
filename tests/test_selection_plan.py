"""The selection stage on data: which tests a change picks, given a who-tests-what map and an import graph.

No sandbox here: the maps are written by hand in the shape coverage.py's contexts give them (node ids,
``fixture:<name>``, and the empty context for import time). The end-to-end tests in test_selection.py
check the same decisions on real runs.
"""

from __future__ import annotations

from verifier.models import Change, FileChange
from verifier.models import TestOutcome as Outcome
from verifier.selection.impactmap import ImpactMap
from verifier.selection.imports import build_graph, dotted_name
from verifier.selection.plan import functions, innermost, plan, touched_scopes
from verifier.testrun.differential import classify, classify_run, regressions

RATES = '''\
"""Parcel rates."""
BASE = 4


def base_rate(weight):
    total = BASE
    if weight > 10:
        total += 2
    return total


def surcharge(zone):
    # remote zones cost more
    return 3 if zone == "remote" else 0
'''

TEST_A = "tests/test_rates.py::test_base_rate"
TEST_B = "tests/test_rates.py::test_surcharge"
TEST_C = "tests/test_labels.py::test_label"


def rates_map() -> ImpactMap:
    return ImpactMap(
        tree="t",
        environment="e",
        outcomes={TEST_A: "passed", TEST_B: "passed", TEST_C: "passed"},
        fixtures={TEST_A: (), TEST_B: (), TEST_C: ("zones",)},
        lines={
            "src/parcelkit/rates.py": {
                2: ("",),
                5: ("",),
                6: (TEST_A,),
                7: (TEST_A,),
                9: (TEST_A,),
                12: ("",),
                14: (TEST_B, "fixture:zones"),
            }
        },
    )


def change_of(
    path: str,
    added: tuple[int, ...] = (),
    removed: tuple[int, ...] = (),
    status: str = "modified",
    old_path: str | None = "",
) -> Change:
    old = path if old_path == "" else old_path
    files = (FileChange(path, old, status, added_lines=added, removed_lines=removed),)  # type: ignore[arg-type]
    return Change("A..B", "range", "a" * 40, "b" * 40, (), files)


def no_importers(_side: str, _path: str) -> set[str]:
    return set()


def test_a_change_inside_a_function_picks_the_tests_that_ran_that_function():
    head = RATES.replace("total += 2", "total += 3")
    picks = plan(
        change_of("src/parcelkit/rates.py", added=(8,), removed=(8,)),
        rates_map(),
        {"src/parcelkit/rates.py": RATES},
        {"src/parcelkit/rates.py": head},
        no_importers,
    )
    assert set(picks.node_ids) == {TEST_A}
    assert picks.node_ids[TEST_A] == ["ran parcelkit.rates.base_rate, which the change modifies"]
    assert not picks.files


def test_a_line_run_during_a_fixture_picks_every_test_using_the_fixture():
    head = RATES.replace('return 3 if zone == "remote" else 0', 'return 5 if zone == "remote" else 0')
    picks = plan(
        change_of("src/parcelkit/rates.py", added=(14,), removed=(14,)),
        rates_map(),
        {"src/parcelkit/rates.py": RATES},
        {"src/parcelkit/rates.py": head},
        no_importers,
    )
    assert set(picks.node_ids) == {TEST_B, TEST_C}  # TEST_C uses the fixture "zones", which ran line 14


def test_a_module_level_change_picks_the_files_tests_and_the_importers():
    head = RATES.replace("BASE = 4", "BASE = 5")

    def importers(side: str, path: str) -> set[str]:
        assert (side, path) == ("base", "src/parcelkit/rates.py")
        return {"src/parcelkit/labels.py", "tests/test_labels.py", "tests/test_imports_only.py"}

    picks = plan(
        change_of("src/parcelkit/rates.py", added=(2,), removed=(2,)),
        rates_map(),
        {"src/parcelkit/rates.py": RATES},
        {"src/parcelkit/rates.py": head},
        importers,
    )
    assert set(picks.node_ids) == {TEST_A, TEST_B, TEST_C}
    assert set(picks.files) == {"tests/test_labels.py", "tests/test_imports_only.py"}  # test files only


def test_comments_and_blank_lines_change_nothing_a_test_can_see():
    head = RATES.replace("    # remote zones cost more\n", "    # remote zones cost more (see the tariff)\n\n")
    picks = plan(
        change_of("src/parcelkit/rates.py", added=(13, 14), removed=(13,)),
        rates_map(),
        {"src/parcelkit/rates.py": RATES},
        {"src/parcelkit/rates.py": head},
        no_importers,
    )
    assert not picks.node_ids and not picks.files


def test_a_new_function_picks_the_tests_that_executed_the_file():
    head = RATES + "\n\ndef insurance(value):\n    return value // 100\n"
    picks = plan(
        change_of("src/parcelkit/rates.py", added=(17, 18)),
        rates_map(),
        {"src/parcelkit/rates.py": RATES},
        {"src/parcelkit/rates.py": head},
        no_importers,
    )
    assert set(picks.node_ids) == {TEST_A, TEST_B, TEST_C}
    assert picks.node_ids[TEST_A] == ["ran parcelkit.rates, which gets the new function insurance"]


def test_added_and_modified_test_files_run_whole_and_base_failures_always_run():
    impact = rates_map()
    failing = ImpactMap(
        impact.tree, impact.environment, {**impact.outcomes, TEST_B: "failed"}, impact.fixtures, impact.lines
    )
    change = Change(
        "A..B", "range", "a" * 40, "b" * 40, (), (FileChange("tests/test_new.py", None, "added", added_lines=(1, 2)),)
    )
    picks = plan(change, failing, {}, {"tests/test_new.py": "def test_x():\n    pass\n"}, no_importers)
    assert picks.files == {"tests/test_new.py": ["the change adds this test file"]}
    assert picks.node_ids == {TEST_B: ["failed at base"]}


def test_without_a_map_the_importers_are_chosen():
    picks = plan(
        change_of("src/parcelkit/rates.py", added=(8,), removed=(8,)),
        None,
        {"src/parcelkit/rates.py": RATES},
        {"src/parcelkit/rates.py": RATES},
        lambda _side, _path: {"tests/test_rates.py", "src/parcelkit/labels.py"},
    )
    assert set(picks.files) == {"tests/test_rates.py"}
    assert "no map" in picks.files["tests/test_rates.py"][0]


def test_scopes_follow_pythons_own_parse_of_the_file():
    # The line numbers of function bodies come from ast (Python's docs: ast.AST.lineno / end_lineno).
    found = functions(
        "class Rate:\n    def value(self):\n        return 1\n\n\ndef top():\n    def inner():\n"
        "        return 2\n    return inner()\n"
    )
    assert [(f.name, f.body_start, f.end) for f in found or () if not f.is_class] == [
        ("Rate.value", 3, 3),
        ("top", 7, 9),
        ("top.inner", 8, 8),
    ]
    assert innermost(found, 8).name == "top.inner"  # type: ignore[union-attr]
    assert innermost(found, 7).name == "top"  # a nested def line runs in the enclosing function
    assert innermost(found, 2) is None  # a def line of a method runs in the class body, at import time
    assert functions("def broken(:\n") is None


def test_an_added_line_in_an_existing_method_maps_to_the_base_method():
    base = "class Rate:\n    def value(self):\n        return 1\n"
    head = "class Rate:\n    def value(self):\n        extra = 0\n        return 1 + extra\n"
    change = FileChange("r.py", "r.py", "modified", added_lines=(3, 4), removed_lines=(3,))
    scopes = touched_scopes(change, base, head)
    assert {scope.function.name for scope in scopes if scope.function} == {"Rate.value"}


def test_the_import_graph_resolves_relative_and_transitive_imports():
    graph = build_graph(
        {
            "src/parcelkit/__init__.py": "",
            "src/parcelkit/rates.py": "BASE = 4\n",
            "src/parcelkit/labels.py": "from .rates import BASE\n",
            "src/parcelkit/late.py": "def load():\n    import importlib\n\n"
            "    return importlib.import_module('parcelkit.rates')\n",
            "tests/test_labels.py": "from parcelkit import labels\n",
            "tests/test_other.py": "import json\n",
        }
    )
    importers = graph.importers(["src/parcelkit/rates.py"])
    assert importers == {"src/parcelkit/labels.py", "src/parcelkit/late.py", "tests/test_labels.py"}
    assert dotted_name("src/parcelkit/__init__.py") == "src.parcelkit"
    assert dotted_name("my-project/parcelkit/rates.py") == "parcelkit.rates"


def test_differential_classes():
    assert classify(None, "failed") == "new"
    assert classify("passed", "failed") == "broken"
    assert classify("failed", "passed") == "fixed"
    assert classify("error", "failed") == "still-failing"
    assert classify("passed", "flaky") == "unchanged"  # a flaky test passed on a re-run
    tests = (Outcome("t::a", "failed"), Outcome("t::b", "failed"), Outcome("t::c", "failed"))
    baseline = {"t::a": "passed", "t::b": "failed"}
    assert classify_run(tests, baseline) == {"t::a": "broken", "t::b": "still-failing", "t::c": "new"}
    assert [t.node_id for t in regressions(tests, baseline)] == ["t::a", "t::c"]
    assert len(regressions(tests, None)) == 3  # no baseline: no failure can be shown to be old
