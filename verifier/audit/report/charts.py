"""Bar charts of our own for the audit page: the geometry of each bar, axis and label in plain numbers.

The page's template (``templates/audit.html.j2``) writes these as inline SVG, so every text a chart shows
goes through the template's escaping like the rest of the page. Values are percentages on a fixed 0 to 100
scale; a period without data (no added lines, no machine commit) draws no bar and says "n/a".
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from verifier.audit.model import AgentWeek, Period
from verifier.audit.report.numbers import percent

WIDTH = 500
HEIGHT = 260
_LEFT, _RIGHT, _TOP, _BOTTOM = 44, 12, 34, 48  # margins around the plot area
_TICKS = (0, 25, 50, 75, 100)
_BAR_SHARE = 0.7  # of each slot, the bar's width; the rest is the gap


@dataclass(frozen=True)
class Bar:
    label: str  # under the bar
    value_text: str  # above the bar, and its tooltip
    x: float
    y: float
    width: float
    height: float
    label_x: float  # the centre of the slot


@dataclass(frozen=True)
class Tick:
    text: str
    y: float


@dataclass(frozen=True)
class Chart:
    chart_id: str
    title: str
    axis_label: str
    bars: tuple[Bar, ...]
    ticks: tuple[Tick, ...]
    width: int = WIDTH
    height: int = HEIGHT
    plot_left: float = _LEFT
    plot_right: float = WIDTH - _RIGHT
    plot_bottom: float = HEIGHT - _BOTTOM


def bar_chart(chart_id: str, title: str, axis_label: str, values: Sequence[tuple[str, float | None]]) -> Chart:
    """A chart of one bar per (label, percentage); None draws no bar."""
    plot_width = WIDTH - _LEFT - _RIGHT
    plot_height = HEIGHT - _TOP - _BOTTOM
    slot = plot_width / max(len(values), 1)
    bars = []
    for index, (label, value) in enumerate(values):
        shown = min(max(value or 0.0, 0.0), 100.0)
        height = plot_height * shown / 100.0
        left = _LEFT + index * slot
        bars.append(
            Bar(
                label=label,
                value_text=percent(value),
                x=round(left + slot * (1 - _BAR_SHARE) / 2, 2),
                y=round(_TOP + plot_height - height, 2),
                width=round(slot * _BAR_SHARE, 2),
                height=round(height, 2),
                label_x=round(left + slot / 2, 2),
            )
        )
    ticks = tuple(Tick(f"{t}", round(_TOP + plot_height * (1 - t / 100), 2)) for t in _TICKS)
    return Chart(chart_id, title, axis_label, tuple(bars), ticks)


def trend_charts(trend: Sequence[Period]) -> tuple[Chart, ...]:
    """The page's two trend charts: per week, the machine share of added lines and the share checked."""
    return (
        bar_chart(
            "chart-machine-share",
            "Machine share of added lines (%)",
            "week starting",
            [(p.since[5:10], p.machine_share) for p in trend],
        ),
        bar_chart(
            "chart-verified-share",
            "Machine commits checked by the gate (%)",
            "week starting",
            [(p.since[5:10], p.verified_share) for p in trend],
        ),
    )


def mutation_charts(rows: Sequence[AgentWeek]) -> tuple[Chart, ...]:
    """One small chart per week with mutation data: a bar per agent, its mutation score."""
    weeks: dict[str, list[AgentWeek]] = {}
    for row in rows:
        weeks.setdefault(row.since, []).append(row)
    return tuple(
        bar_chart(
            f"chart-mutation-{since[:10]}",
            f"Mutation score, week from {since[:10]} (%)",
            "agent",
            [(r.agent, r.mutants.score if r.mutants else None) for r in mine],
        )
        for since, mine in weeks.items()
        if any(r.mutants is not None for r in mine)
    )
