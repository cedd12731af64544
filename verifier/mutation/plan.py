"""Which mutants the stage tries: a few per executable machine-written line, chosen deterministically.

The choice is seeded by the line's own text (and its file's path), so a re-check of the same code gives
the same mutants, and a line that moves keeps its mutants. Kinds of fault are spread: the first pick of
every operator comes before a second pick of any, in an order the seed decides.
"""

from __future__ import annotations

import hashlib
import random
from collections.abc import Iterable

from verifier.models import Mutant
from verifier.mutation.operators import FileMutator, Proposal

DEFAULT_PER_LINE = 3


def mutants_for_file(path: str, source: str, lines: Iterable[int], per_line: int = DEFAULT_PER_LINE) -> list[Mutant]:
    """Up to ``per_line`` mutants of each of ``lines`` (1-based) of ``source``; none for a file that does
    not parse (the syntax rule reports it)."""
    try:
        mutator = FileMutator(source, path)
    except (SyntaxError, ValueError):
        return []
    chosen: list[Mutant] = []
    for line in sorted(set(lines)):
        if 0 < line <= len(mutator.rows):
            chosen += pick(mutator, line, per_line)
    return chosen


def pick(mutator: FileMutator, line: int, per_line: int) -> list[Mutant]:
    """The line's mutants in the seeded order, the first ``per_line`` that render (every one compiles)."""
    picked: list[Mutant] = []
    for proposal in seeded_order(mutator.proposals(line), f"{mutator.path}\n{mutator.rows[line - 1]}"):
        if len(picked) >= per_line:
            break
        mutant = mutator.render(proposal)
        if mutant is not None and all(m.mutated != mutant.mutated for m in picked):
            picked.append(mutant)
    return picked


def seeded_order(proposals: list[Proposal], seed_text: str) -> list[Proposal]:
    """Shuffle with a seed from ``seed_text``, then put each operator's first pick before any second one."""
    seed = int.from_bytes(hashlib.sha256(seed_text.encode("utf-8")).digest()[:8], "big")
    shuffled = list(proposals)
    random.Random(seed).shuffle(shuffled)
    seen: dict[str, int] = {}
    ranked = []
    for position, proposal in enumerate(shuffled):
        rank = seen.get(proposal.operator, 0)
        seen[proposal.operator] = rank + 1
        ranked.append((rank, position, proposal))
    return [proposal for _rank, _position, proposal in sorted(ranked, key=lambda item: item[:2])]
