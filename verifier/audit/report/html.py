"""The audit as one self-contained HTML page: headline figures, trend charts (inline SVG drawn by
:mod:`.charts`), sortable tables (a small inline script of our own) and each commit linked to its findings.

The page is the jinja2 template ``templates/audit.html.j2`` (package data), rendered with autoescaping on:
commit subjects, names, paths and messages come from the repository and its notes, so they are untrusted
and every one of them is escaped. The script marks the page: ``data-audit-ready="1"`` on the root element
once the tables are set up, ``data-audit-error`` with the message when any script error happens (the
Chromium test reads both).
"""

from __future__ import annotations

from functools import lru_cache

import jinja2

from verifier.audit.model import DEFINITIONS, Audit, Period
from verifier.audit.report.charts import mutation_charts, trend_charts
from verifier.audit.report.numbers import percent

TEMPLATE = "audit.html.j2"


@lru_cache(maxsize=1)
def _environment() -> jinja2.Environment:
    return jinja2.Environment(
        loader=jinja2.PackageLoader("verifier.audit.report", "templates"),
        autoescape=True,  # on for every template, whatever its name ends with
        undefined=jinja2.StrictUndefined,  # a misspelt name in the template is an error, not an empty cell
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
    )


def render(audit: Audit) -> str:
    return (
        _environment()
        .get_template(TEMPLATE)
        .render(
            audit=audit,
            window=audit.window,
            cards=_cards(audit.window, audit),
            charts=trend_charts(audit.trend),
            mutation_charts=mutation_charts(audit.mutation),
            count=lambda n: "n/a" if n is None else n,
            skipped_at_commit=sum(1 for c in audit.commits if c.at_commit == "skipped"),
            definitions=DEFINITIONS,
            yes_no=lambda flag: "yes" if flag else "no",
        )
    )


def _cards(w: Period, audit: Audit) -> list[tuple[str, object, bool]]:
    """The headline figures: (label, value, whether a non-zero value is bad news)."""
    return [
        ("machine commits", f"{w.machine_commits} / {w.commits}", False),
        ("machine share of added lines", percent(w.machine_share), False),
        ("checked by the gate", percent(w.verified_share), False),
        ("passed", f"{w.passed} / {w.machine_commits}", False),
        ("unverified", w.unverified, w.unverified > 0),
        ("skipped at commit time", w.skipped_at_commit, w.skipped_at_commit > 0),
        ("merged although blocked", w.blocked_merged, w.blocked_merged > 0),
        ("machine lines alive at the end", f"{w.machine_lines_alive} / {w.machine_lines_added}", False),
        (f"rewritten within {audit.churn_days} days", w.machine_lines_churned, False),
        ("reverts of machine commits", len(audit.reverts), False),
        ("mutation score", percent(w.mutants.score) if w.mutants else "no data", False),
        ("surviving mutants", w.mutants.survived if w.mutants else "no data", bool(w.mutants and w.mutants.survived)),
    ]
