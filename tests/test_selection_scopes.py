"""The selection stage's precision rules on data: a change inside a function, a new method or function,
module-level statements, and the cases where a new definition cannot be trusted to be new.

The maps are written by hand in the shape coverage.py's contexts give them (node ids per line, the empty
context for import time); which lines a change adds or removes comes from Python's difflib, and the
function a line belongs to from Python's own parser (ast), as the stage reads them.
"""

from __future__ import annotations

import difflib

from verifier.models import Change, FileChange
from verifier.selection.impactmap import ImpactMap
from verifier.selection.plan import Picks, plan

PATH = "src/tariffs.py"
TARIFFS = '''\
"""Tariffs of Quillfeather Logistics."""
from math import ceil


class Tariff:
    rate = 2

    def price(self, weight):
        return ceil(weight) * self.rate

    def describe(self):
        return f"{self.rate}/kg"


class Zone:
    name = "local"


def insure(value):
    return value // 100
'''
PRICE, DESCRIBE, INSURE = (
    "tests/test_tariffs.py::test_price",
    "tests/test_tariffs.py::test_describe",
    "tests/test_insure.py::test_insure",
)
ZONE, OTHER = "tests/test_zone.py::test_zone_name", "tests/test_other.py::test_other"
IMPORTERS = {"tests/test_tariffs.py", "tests/test_zone.py", "tests/test_insure.py"}
EVERY_TEST_OF_THE_FILE = {PRICE, DESCRIBE, INSURE}


def tariffs_map(source: str = TARIFFS) -> ImpactMap:
    rows = source.split("\n")
    at_import = {n for n, row in enumerate(rows, 1) if row.strip() and not row.startswith((" " * 8, '"""'))}
    lines: dict[int, tuple[str, ...]] = {n: ("",) for n in at_import}
    lines.update({9: (PRICE,), 12: (DESCRIBE,), 20: (INSURE,)})
    outcomes = dict.fromkeys((PRICE, DESCRIBE, INSURE, ZONE, OTHER), "passed")
    return ImpactMap("t", "e", outcomes, dict.fromkeys(outcomes, ()), {PATH: lines})


def changed(base: str, head: str) -> Change:
    """The change from ``base`` to ``head`` of PATH, its lines numbered as a unified diff numbers them."""
    added: list[int] = []
    removed: list[int] = []
    matcher = difflib.SequenceMatcher(a=base.split("\n"), b=head.split("\n"), autojunk=False)
    for tag, a1, a2, b1, b2 in matcher.get_opcodes():
        if tag != "equal":
            removed += range(a1 + 1, a2 + 1)
            added += range(b1 + 1, b2 + 1)
    files = (FileChange(PATH, PATH, "modified", added_lines=tuple(added), removed_lines=tuple(removed)),)
    return Change("A..B", "range", "a" * 40, "b" * 40, (), files)


def pick(head: str, base: str = TARIFFS, referrers: dict[str, set[str]] | None = None) -> Picks:
    return plan(
        changed(base, head),
        tariffs_map(base),
        {PATH: base},
        {PATH: head},
        lambda _side, _path: set(IMPORTERS),
        lambda name: (referrers or {}).get(name, set()),
    )


def test_a_change_inside_a_method_picks_only_the_tests_that_ran_it():
    picks = pick(TARIFFS.replace("ceil(weight) * self.rate", "round(weight) * self.rate"))
    assert picks.node_ids == {PRICE: ["ran tariffs.Tariff.price, which the change modifies"]}
    assert not picks.files


def test_a_new_method_picks_the_tests_that_ran_its_class_not_every_importer():
    head = TARIFFS.replace(
        "    def describe(self):", "    def discount(self):\n        return 0\n\n    def describe(self):"
    )
    picks = pick(head)
    assert set(picks.node_ids) == {PRICE, DESCRIBE}  # INSURE and ZONE never ran a method of Tariff
    assert picks.node_ids[PRICE] == ["ran tariffs.Tariff, which gets the new method discount"]
    assert not picks.files


def test_a_new_method_also_picks_the_test_files_that_mention_its_name():
    head = TARIFFS.replace(
        "    def describe(self):", "    def discount(self):\n        return 0\n\n    def describe(self):"
    )
    picks = pick(head, referrers={"discount": {"tests/test_shop.py", PATH}})
    assert picks.files == {"tests/test_shop.py": ["mentions discount, which the change adds"]}


def test_a_new_method_an_existing_getattr_names_brings_the_tests_of_that_code():
    base = TARIFFS.replace('return f"{self.rate}/kg"', 'return getattr(self, "discount", lambda: 0)()')
    head = base.replace(
        "    def describe(self):", "    def discount(self):\n        return 1\n\n    def describe(self):"
    )
    picks = pick(head, base=base)
    assert {PRICE, DESCRIBE, INSURE} <= set(picks.node_ids)
    assert "ran tariffs, which mentions discount, which the change adds" in picks.node_ids[INSURE]


def test_a_new_function_picks_the_tests_that_ran_its_module():
    picks = pick(TARIFFS + "\n\ndef surcharge(zone):\n    return 3\n")
    assert set(picks.node_ids) == EVERY_TEST_OF_THE_FILE
    assert picks.node_ids[INSURE] == ["ran tariffs, which gets the new function surcharge"]
    assert not picks.files  # the importers that never ran the module cannot call a name it did not have


def wide(picks: Picks) -> bool:
    """The module-level rule: every test that ran the file and every importing test file."""
    return set(picks.node_ids) == EVERY_TEST_OF_THE_FILE and set(picks.files) == IMPORTERS


def test_a_new_special_method_is_a_module_level_change():
    # Python calls __eq__ for ==, wherever a Tariff is compared (the data model, "Basic customization").
    head = TARIFFS.replace(
        "    def describe(self):", "    def __eq__(self, other):\n        return True\n\n    def describe(self):"
    )
    assert wide(pick(head))


def test_a_new_method_of_a_class_no_test_ran_a_method_of_is_a_module_level_change():
    assert wide(
        pick(TARIFFS.replace('    name = "local"\n', '    name = "local"\n\n    def code(self):\n        return 1\n'))
    )


def test_a_new_function_that_replaces_an_imported_name_is_a_module_level_change():
    assert wide(pick(TARIFFS + "\n\ndef ceil(value):\n    return int(value)\n"))


def test_a_new_decorated_function_is_a_module_level_change():
    # A decorator runs when the module is imported and may record the function anywhere (a registry).
    assert wide(pick(TARIFFS + "\n\n@register\ndef express(value):\n    return value\n"))
    assert not wide(
        pick(
            TARIFFS.replace(
                "    def describe(self):",
                "    @property\n    def weight(self):\n        return 1\n\n    def describe(self):",
            )
        )
    )


def test_a_new_class_with_a_base_class_is_a_module_level_change():
    assert wide(pick(TARIFFS + "\n\nclass Express(Tariff):\n    rate = 5\n"))
    assert not wide(pick(TARIFFS + "\n\nclass Express:\n    rate = 5\n"))


def test_class_attributes_and_default_arguments_keep_the_module_level_rule():
    assert wide(pick(TARIFFS.replace("    rate = 2", "    rate = 3")))
    assert wide(pick(TARIFFS.replace("def insure(value):", "def insure(value, floor=0):")))


def test_a_removed_method_is_a_module_level_change():
    assert wide(pick(TARIFFS.replace('    def describe(self):\n        return f"{self.rate}/kg"\n', "")))
