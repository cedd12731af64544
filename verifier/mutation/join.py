"""Joining the mutants of ``verifier check --part K/N`` reports into the outcome one run would have given.

Every shard plans the same mutants (the choice is deterministic) and runs each one against its own share
of the tests that executed the mutant's line; so the shards split the mutation work the way they split
the tests. A mutant is killed when any shard killed it (a test that fails in one shard fails in one run);
it survived when it survived every shard that ran it; it could not be tried (error) when a shard could
not try it and none killed it; not-run when no shard's tests executed its line. The tests are the union.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from verifier.models import Mutant, MutantOutcome, MutationResult

_RANK = {"killed": 0, "timeout": 0, "crashed": 0, "error": 1, "survived": 2, "not-run": 3}


def joined_mutation(reports: Sequence[Mapping[str, Any]]) -> MutationResult | None:
    """The joined outcomes; None when no shard ran the mutation stage (its reports list no "mutation")."""
    if not any(isinstance(report.get("mutation"), Mapping) for report in reports):
        return None
    joined: dict[tuple[str, int, str, str], MutantOutcome] = {}
    for report in reports:
        for entry in report.get("mutants") or ():
            outcome = _outcome(entry)
            if outcome is None:
                continue
            key = (outcome.mutant.path, outcome.mutant.line, outcome.mutant.original, outcome.mutant.mutated)
            known = joined.get(key)
            if known is None:
                joined[key] = outcome
                continue
            tests = tuple(sorted(set(known.tests) | set(outcome.tests)))
            best = outcome if _RANK[outcome.status] < _RANK[known.status] else known
            joined[key] = MutantOutcome(best.mutant, best.status, tests, best.killed_by, best.problem)
    ordered = tuple(joined[key] for key in sorted(joined, key=lambda k: (k[0], k[1])))
    problem = next((o.problem for o in ordered if o.status == "error" and o.problem), None)
    return MutationResult(ordered, 0.0, 0, None, problem)


def _outcome(entry: Any) -> MutantOutcome | None:
    """One mutant of a shard's JSON report, or None when the entry is not one."""
    if not isinstance(entry, Mapping) or entry.get("status") not in _RANK:
        return None
    try:
        mutant = Mutant(
            path=str(entry["path"]),
            line=int(entry["line"]),
            end_line=int(entry.get("end_line", entry["line"])),
            operator=str(entry.get("operator", "")),
            original=str(entry["original"]),
            mutated=str(entry["mutated"]),
        )
        tests = tuple(str(test) for test in entry.get("tests") or ())
    except (KeyError, TypeError, ValueError):
        return None
    killed_by = entry.get("killed_by") if isinstance(entry.get("killed_by"), str) else None
    problem = entry.get("problem") if isinstance(entry.get("problem"), str) else None
    return MutantOutcome(mutant, entry["status"], tests, killed_by, problem)
