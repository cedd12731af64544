"""The mutation operators on real code: every mutant compiles, applies by plain text replacement, and
changes behaviour on a probe input; lines with nothing meaningful to break give no mutant."""

from __future__ import annotations

import ast
import textwrap
from typing import Any

import pytest

from verifier.models import Mutant
from verifier.mutation.operators import FileMutator
from verifier.mutation.plan import mutants_for_file

SAMPLE = '''\
"""A small library with one function per kind of fault."""


def clamp(value, low, high):
    if value < low:
        return "below"
    if value > high:
        return "above"
    return value


def total(prices, rate):
    result = 0
    for price in prices:
        if price is None:
            continue
        result += price * rate
    return result - 1


def first_negative(numbers):
    found = None
    for number in numbers:
        if number < 0:
            found = number
            break
    return found


def check(name, allowed):
    if name not in allowed and name != "root":
        raise ValueError("not allowed: " + name)
    return True


def labels(count, flag):
    out = []
    out.append("start")
    if not flag or count >= 2:
        out.append("many")
    return out


def ratio(a, b):
    return (a % 7 + a // 2) ** 2 / (b or 1)


def sign(flag):
    return -1 if flag else 1


def parts(word):
    return [letter for letter in word if letter != "x"]


class Account:
    def balance(self, credits, debits):
        return sum(credits) - sum(debits) >= 0
'''

# Inputs that tell each function's mutants apart from the original (boundaries included).
PROBES: dict[str, list[tuple[Any, ...]]] = {
    "clamp": [(5, 1, 10), (0, 1, 10), (11, 1, 10), (1, 1, 10), (10, 1, 10)],
    "total": [([1, None, 2], 3), ([], 1), ([5], 0.5)],
    "first_negative": [([3, -1, -2],), ([1, 2],), ([0, -1],)],
    "check": [("x", ["a"]), ("a", ["a"]), ("root", [])],
    "labels": [(1, True), (2, True), (1, False)],
    "ratio": [(10, 3), (10, 0), (3, 5)],
    "sign": [(True,), (False,)],
    "parts": [("axb",), ("",)],
    "Account.balance": [(None, [5], [3]), (None, [3], [3]), (None, [1], [3])],
}


def behaviour(source: str, qualname: str) -> list[str]:
    """What the function does on its probes: the repr of each result, or the exception's type."""
    namespace: dict[str, Any] = {}
    exec(compile(source, "sample.py", "exec"), namespace)
    target: Any = namespace[qualname.split(".")[0]]
    for part in qualname.split(".")[1:]:
        target = getattr(target, part)
    seen = []
    for probe in PROBES[qualname]:
        try:
            seen.append(repr(target(*probe)))
        except Exception as error:  # the kind of failure is behaviour too
            seen.append(type(error).__name__)
    return seen


def every_mutant(source: str) -> list[Mutant]:
    mutator = FileMutator(source, "sample.py")
    rendered = (mutator.render(p) for line in range(1, len(mutator.rows) + 1) for p in mutator.proposals(line))
    return [mutant for mutant in rendered if mutant is not None]


def apply(source: str, mutant: Mutant) -> str:
    """A plain text replacement, as a reader of the report would apply it."""
    assert source.count(mutant.original) >= 1
    rows = source.split("\n")
    assert "\n".join(rows[mutant.line - 1 : mutant.end_line]) == mutant.original
    return "\n".join([*rows[: mutant.line - 1], mutant.mutated, *rows[mutant.end_line :]])


MUTANTS = every_mutant(SAMPLE)


def test_every_operator_of_the_issue_is_exercised() -> None:
    operators = {mutant.operator for mutant in MUTANTS}
    expected = {"compare", "arithmetic", "negate", "and-or", "constant", "return", "remove-call"}
    expected |= {"remove-update", "skip-raise", "loop-jump", "unary"}
    assert expected <= operators, expected - operators


@pytest.mark.parametrize("mutant", MUTANTS, ids=lambda m: f"{m.line}-{m.operator}-{m.mutated.strip()}")
def test_mutant_compiles_and_changes_behaviour(mutant: Mutant) -> None:
    mutated = apply(SAMPLE, mutant)
    compile(mutated, "sample.py", "exec")  # Python's own compiler accepts it
    assert mutant.scope in PROBES
    assert behaviour(mutated, mutant.scope) != behaviour(SAMPLE, mutant.scope)


@pytest.mark.parametrize("mutant", MUTANTS, ids=lambda m: f"{m.line}-{m.operator}")
def test_mutant_is_one_node_of_the_tree(mutant: Mutant) -> None:
    """The text change is a syntax-tree change: exactly one statement of the file differs."""
    before = [ast.dump(node) for node in ast.walk(ast.parse(SAMPLE)) if isinstance(node, ast.stmt)]
    after = [ast.dump(node) for node in ast.walk(ast.parse(apply(SAMPLE, mutant))) if isinstance(node, ast.stmt)]
    differing_simple = [
        (a, b) for a, b in zip(before, after, strict=True) if a != b and not a.startswith(("FunctionDef", "Module"))
    ]
    assert differing_simple  # something changed ...
    assert len(before) == len(after)  # ... and nothing was added or lost (a removal leaves ``pass``)


def test_texts_keep_the_file_spelling() -> None:
    """Only the fault changes: quotes, spacing and literals the fault does not touch stay as written."""
    texts = {(m.line, m.mutated) for m in MUTANTS}
    assert (31, '    if name not in allowed or name != "root":') in texts
    assert (31, '    if name in allowed and name != "root":') in texts
    assert (18, "    return result + 1") in texts


@pytest.mark.parametrize(
    "code",
    [
        'def f():\n    """Only a docstring."""\n',
        "def f():\n    pass\n",
        "def f():\n    ...\n",
        "import os\nfrom os import path\n",
        "import logging\nlog = logging.getLogger()\n\n\ndef f(x):\n    log.debug('x=%s', x)\n    logging.info(x)\n",
        "def f(x):\n    print(x)\n",
        "def f():\n    raise NotImplementedError\n",
        "def f():\n    raise NotImplementedError('later')\n",
        "x: int\n",
        "def f(x: int = 3) -> int:\n    assert x > 0\n",
        "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    LIMIT = 3\n",
        "import warnings\n\n\ndef f():\n    warnings.warn('old')\n",
    ],
)
def test_lines_without_meaningful_faults_give_no_mutant(code: str) -> None:
    assert every_mutant(code) == []


def test_choice_is_capped_deterministic_and_follows_the_line() -> None:
    lines = range(1, len(SAMPLE.split("\n")) + 1)
    first = mutants_for_file("lib/sample.py", SAMPLE, lines, per_line=2)
    again = mutants_for_file("lib/sample.py", SAMPLE, lines, per_line=2)
    assert first == again
    per_line: dict[int, int] = {}
    for mutant in first:
        per_line[mutant.line] = per_line.get(mutant.line, 0) + 1
    assert max(per_line.values()) == 2
    shifted = "\n\n\n" + SAMPLE  # the same lines, three lines lower: the same mutants
    moved = mutants_for_file("lib/sample.py", shifted, [n + 3 for n in lines], per_line=2)
    assert [(m.line - 3, m.original, m.mutated) for m in moved] == [(m.line, m.original, m.mutated) for m in first]
    assert len({m.operator for m in first if m.line == 31}) == 2  # two picks of one line: two kinds of fault


def test_crlf_file_and_unicode_columns_apply_exactly() -> None:
    source = textwrap.dedent(
        """\
        def greet(name):
            label = "héllo wörld"
            if name == "ümlaut":
                return label + name
            return name
        """
    ).replace("\n", "\r\n")
    mutants = every_mutant(source)
    assert mutants
    for mutant in mutants:
        mutated = apply(source, mutant)
        assert mutated.count("\r\n") == source.count("\r\n")  # line endings kept
        compile(mutated, "greet.py", "exec")
    assert any(m.mutated == '    if name != "ümlaut":\r' for m in mutants)


def test_module_level_and_method_scopes() -> None:
    source = "LIMIT = 3\n\n\nclass Box:\n    SIZE = 2\n\n    def grow(self, n):\n        return n + self.SIZE\n"
    scopes = {m.line: m.scope for m in every_mutant(source)}
    assert scopes == {1: None, 5: None, 8: "Box.grow"}


def test_a_file_that_does_not_parse_gives_no_mutant() -> None:
    assert mutants_for_file("bad.py", "def broken(:\n", [1]) == []
