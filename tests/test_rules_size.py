"""patch.size on real commits: the count of machine-written lines against the policy's limit."""

from __future__ import annotations

from test_rules_support import findings, machine_change

from verifier.demo.scratch import ScratchRepo
from verifier.verdict.judge import apply_rules


def lines(count: int) -> str:
    return "".join(f"RATE_{n} = {n}\n" for n in range(count))


def test_over_the_limit_warns(repo: ScratchRepo) -> None:
    context = machine_change(
        repo,
        None,
        {"parcelkit/table.py": lines(30), "parcelkit/more.py": lines(5)},
        options={"patch.size": {"max_lines": 20}},
    )
    found = findings("patch.size", context)
    assert [f.details["lines"] for f in found] == [35]  # git's diff: 30 + 5 added lines
    judged = [f for f in apply_rules("static", context) if f.rule == "patch.size"]
    assert [f.severity for f in judged] == ["warn"]  # the default setting


def test_at_the_limit_or_excluded_is_silent(repo: ScratchRepo) -> None:
    context = machine_change(
        repo,
        None,
        {"parcelkit/table.py": lines(20), "gen/schema.py": lines(50)},
        options={"patch.size": {"max_lines": 20, "exclude": ["gen/**"]}},
    )
    assert findings("patch.size", context) == []
