"""Side-by-side timing for the benchmarks: two commands run in turn (A B A B ...), medians and the ratio.

Alternating the runs keeps a drift in the machine's speed from favouring either side; the ratio is taken
pair by pair and its median printed. Used by every script in this folder.
"""

from __future__ import annotations

import statistics
import subprocess
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass


@dataclass(frozen=True)
class Comparison:
    name_a: str
    name_b: str
    seconds_a: tuple[float, ...]
    seconds_b: tuple[float, ...]

    @property
    def ratio(self) -> float:
        return statistics.median(a / b for a, b in zip(self.seconds_a, self.seconds_b, strict=True))

    def describe(self) -> str:
        return (
            f"{self.name_a}: median {statistics.median(self.seconds_a):.3f}s | {self.name_b}: median "
            f"{statistics.median(self.seconds_b):.3f}s | ratio A/B (median of pairs) {self.ratio:.2f}"
        )


def timed(action: Callable[[], object]) -> float:
    started = time.perf_counter()
    action()
    return time.perf_counter() - started


def run_command(argv: Sequence[str], **kwargs: object) -> Callable[[], object]:
    """An action that runs ``argv`` with its output thrown away (any exit status is fine: it is measured)."""
    return lambda: subprocess.run(argv, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, **kwargs)


def compare(
    name_a: str,
    action_a: Callable[[], object],
    name_b: str,
    action_b: Callable[[], object],
    runs: int = 5,
    warmup: int = 1,
) -> Comparison:
    """Time ``action_a`` and ``action_b`` alternately, after ``warmup`` unmeasured rounds."""
    for _ in range(warmup):
        action_a()
        action_b()
    a, b = [], []
    for _ in range(runs):
        a.append(timed(action_a))
        b.append(timed(action_b))
    return Comparison(name_a, name_b, tuple(a), tuple(b))
