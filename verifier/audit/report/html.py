"""The audit as one self-contained HTML page: headline figures, trend charts (matplotlib, inline SVG),
sortable tables (a small inline script of our own) and each commit linked to its findings.

The script marks the page: ``data-audit-ready="1"`` on the root element once the tables are set up,
``data-audit-error`` with the message when any script error happens (the Chromium test reads both).
"""

from __future__ import annotations

import io
import re
from html import escape

from verifier.audit.model import DEFINITIONS, Audit, AuditCommit, Group, Period
from verifier.audit.report.numbers import percent
from verifier.errors import UsageError

_STYLE = """
body{font-family:system-ui,sans-serif;margin:2rem;color:#1d2430;max-width:72rem}
h1{font-size:1.5rem}h2{font-size:1.15rem;margin-top:2rem}
.cards{display:flex;flex-wrap:wrap;gap:.75rem}.card{border:1px solid #ccd3dd;border-radius:6px;padding:.6rem .9rem}
.card b{display:block;font-size:1.4rem}.bad b{color:#b3261e}
table{border-collapse:collapse;margin:.5rem 0;font-size:.9rem}th,td{border:1px solid #ccd3dd;padding:.25rem .5rem}
th{background:#eef1f5;cursor:pointer;text-align:left}td.n{text-align:right}
tr.unverified td,tr.blocked-merged td{background:#fdecea}.charts{display:flex;flex-wrap:wrap;gap:1rem}
figure{margin:0}figure svg{width:28rem;height:auto}code{font-size:.85rem}
"""

_SCRIPT = """
window.onerror = function (message) {
  document.documentElement.setAttribute('data-audit-error', String(message));
};
function sortBy(table, column, header) {
  var body = table.tBodies[0];
  var rows = Array.prototype.slice.call(body.rows);
  var descending = header.getAttribute('data-order') !== 'desc';
  rows.sort(function (a, b) {
    var x = a.cells[column].getAttribute('data-value') || a.cells[column].textContent;
    var y = b.cells[column].getAttribute('data-value') || b.cells[column].textContent;
    var nx = parseFloat(x), ny = parseFloat(y);
    var order = (!isNaN(nx) && !isNaN(ny)) ? nx - ny : x.localeCompare(y);
    return descending ? -order : order;
  });
  rows.forEach(function (row) { body.appendChild(row); });
  header.setAttribute('data-order', descending ? 'desc' : 'asc');
}
document.addEventListener('DOMContentLoaded', function () {
  var tables = document.querySelectorAll('table.sortable');
  tables.forEach(function (table) {
    Array.prototype.forEach.call(table.tHead.rows[0].cells, function (header, column) {
      header.addEventListener('click', function () { sortBy(table, column, header); });
    });
  });
  var charts = document.querySelectorAll('figure.chart svg').length;
  document.documentElement.setAttribute('data-audit-charts', String(charts));
  document.documentElement.setAttribute('data-audit-tables', String(tables.length));
  document.documentElement.setAttribute('data-audit-ready', '1');
});
"""


def render(audit: Audit) -> str:
    w = audit.window
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f"<title>Audit of {escape(audit.ref)} {w.since[:10]} to {w.until[:10]}</title>",
        f"<style>{_STYLE}</style><script>{_SCRIPT}</script></head><body>",
        f"<h1>Machine-written code on <code>{escape(audit.ref)}</code>, {w.since[:10]} to {w.until[:10]}</h1>",
        *[f"<p><strong>{escape(p)}</strong></p>" for p in audit.problems],
        _cards(w, audit),
        '<h2>Trend</h2><div class="charts">',
        *_charts(audit.trend),
        "</div>",
        _attention(audit),
        "<h2>Machine-written commits</h2>",
        _commit_table(audit.commits),
        _group_table("By agent", audit.agents),
        _group_table("By person (committer)", audit.people),
        _counts(audit),
        _findings(audit.commits),
        _definitions(),
        "</body></html>",
    ]
    return "\n".join(parts) + "\n"


def _card(label: str, value: object, bad: bool = False) -> str:
    return f'<div class="card{" bad" if bad else ""}"><b>{escape(str(value))}</b>{escape(label)}</div>'


def _cards(w: Period, audit: Audit) -> str:
    return (
        '<div class="cards">'
        + "".join(
            [
                _card("machine commits", f"{w.machine_commits} / {w.commits}"),
                _card("machine share of added lines", percent(w.machine_share)),
                _card("checked by the gate", percent(w.verified_share)),
                _card("passed", f"{w.passed} / {w.machine_commits}"),
                _card("unverified", w.unverified, bad=w.unverified > 0),
                _card("skipped at commit time", w.skipped_at_commit, bad=w.skipped_at_commit > 0),
                _card("merged although blocked", w.blocked_merged, bad=w.blocked_merged > 0),
                _card("machine lines alive at the end", f"{w.machine_lines_alive} / {w.machine_lines_added}"),
                _card(f"rewritten within {audit.churn_days} days", w.machine_lines_churned),
                _card("reverts of machine commits", len(audit.reverts)),
            ]
        )
        + "</div>"
    )


def _charts(trend: tuple[Period, ...]) -> list[str]:
    try:
        import matplotlib
    except ImportError as error:
        raise UsageError(
            "the html format draws its charts with matplotlib, which is not installed",
            hint="pip install 'verifier[audit]' (or pip install matplotlib)",
        ) from error

    matplotlib.use("Agg")
    from matplotlib import pyplot

    matplotlib.rcParams.update({"svg.fonttype": "none", "svg.hashsalt": "verifier-audit"})
    labels = [p.since[5:10] for p in trend]
    charts = [
        ("chart-machine-share", "Machine share of added lines (%)", [p.machine_share or 0.0 for p in trend]),
        ("chart-verified-share", "Machine commits checked by the gate (%)", [p.verified_share or 0.0 for p in trend]),
    ]
    figures = []
    for chart_id, title, values in charts:
        figure, axes = pyplot.subplots(figsize=(5.0, 2.6))
        axes.bar(labels, values, color="#3b6ea5")
        axes.set_ylim(0, 100)
        axes.set_title(title, fontsize=10)
        axes.set_xlabel("week starting", fontsize=8)
        axes.tick_params(labelsize=8)
        figure.tight_layout()
        buffer = io.StringIO()
        figure.savefig(buffer, format="svg", metadata={"Date": None})
        pyplot.close(figure)
        svg = re.sub(r"^.*?(?=<svg)", "", buffer.getvalue(), flags=re.DOTALL)
        figures.append(f'<figure class="chart" id="{chart_id}">{svg}</figure>')
    return figures


def _attention(audit: Audit) -> str:
    if not audit.attention:
        skipped = sum(1 for c in audit.commits if c.at_commit == "skipped")
        later = f" ({skipped} skipped at commit time, checked later)" if skipped else ""
        return f"<h2>Needs attention</h2><p>Nothing: every machine commit was checked and none was blocked{later}.</p>"
    return "<h2>Needs attention</h2>" + _commit_table(audit.attention)


def _definitions() -> str:
    items = "".join(f"<dt>{escape(word)}</dt><dd>{escape(meaning)}</dd>" for word, meaning in DEFINITIONS.items())
    return f"<h2>What the words mean</h2><dl>{items}</dl>"


def _commit_table(commits: tuple[AuditCommit, ...]) -> str:
    head = (
        "commit",
        "date",
        "status",
        "checked",
        "passed",
        "at commit time",
        "agent",
        "committer",
        "subject",
        "machine lines",
        "alive",
        "churned",
        "coverage",
        "findings",
    )
    rows = []
    for c in commits:
        link = f'<a href="#findings-{c.sha}"><code>{c.sha[:12]}</code></a>'
        coverage = "" if c.coverage_percent is None else f"{c.coverage_percent:g}%"
        flags = ["yes" if c.checked else "no", "yes" if c.passed else "no", escape(c.at_commit)]
        cells = [link, escape(c.date[:10]), escape(c.status), *flags, escape(c.agent), escape(c.committer)]
        cells.append(escape(c.subject))
        numbers = [c.machine_lines, c.lines_alive, c.lines_churned]
        rows.append(
            f'<tr class="{escape(c.status)}">'
            + "".join(f"<td>{cell}</td>" for cell in cells)
            + "".join(f'<td class="n">{n}</td>' for n in numbers)
            + f'<td class="n" data-value="{c.coverage_percent if c.coverage_percent is not None else -1}">'
            f"{coverage}</td>" + f'<td class="n">{len(c.findings)}</td></tr>'
        )
    return _table(head, rows)


def _table(head: tuple[str, ...], rows: list[str]) -> str:
    header = "".join(f"<th>{escape(h)}</th>" for h in head)
    return f'<table class="sortable"><thead><tr>{header}</tr></thead><tbody>{"".join(rows)}</tbody></table>'


def _group_table(title: str, groups: tuple[Group, ...]) -> str:
    head = ("name", "commits", "machine lines", "alive", "churned", "unverified", "blocked-merged", "reverted")
    rows = [
        f"<tr><td>{escape(g.name)}</td>"
        + "".join(
            f'<td class="n">{n}</td>'
            for n in (
                g.commits,
                g.machine_lines,
                g.lines_alive,
                g.lines_churned,
                g.unverified,
                g.blocked_merged,
                g.reverted,
            )
        )
        + "</tr>"
        for g in groups
    ]
    return f"<h2>{escape(title)}</h2>" + _table(head, rows)


def _counts(audit: Audit) -> str:
    parts = []
    if audit.findings_by_rule:
        rows = [
            f'<tr><td>{escape(r)}</td><td>{escape(s)}</td><td class="n">{n}</td></tr>'
            for r, s, n in audit.findings_by_rule
        ]
        parts.append("<h2>Findings by rule</h2>" + _table(("rule", "severity", "count"), rows))
    if audit.waivers_by_rule:
        rows = [f'<tr><td>{escape(r)}</td><td class="n">{n}</td></tr>' for r, n in audit.waivers_by_rule]
        parts.append("<h2>Waivers used</h2>" + _table(("rule", "count"), rows))
    if audit.expiring_waivers:
        rows = [
            f"<tr><td>{escape(e.waiver.rule)}</td><td>{escape(e.waiver.path)}</td>"
            f"<td>{escape(e.waiver.owner)}</td><td>{escape(e.waiver.expires)}</td>"
            f'<td class="n">{e.days_left}</td></tr>'
            for e in audit.expiring_waivers
        ]
        parts.append("<h2>Waivers expiring soon</h2>" + _table(("rule", "path", "owner", "expires", "days left"), rows))
    if audit.reverts:
        rows = [
            f'<tr><td><code>{r.sha[:12]}</code></td><td><a href="#findings-{r.reverted}"><code>'
            f"{r.reverted[:12]}</code></a></td><td>{escape(r.agent)}</td><td>{escape(r.committer)}</td></tr>"
            for r in audit.reverts
        ]
        parts.append("<h2>Reverts of machine commits</h2>" + _table(("revert", "reverted", "agent", "by"), rows))
    return "\n".join(parts)


def _findings(commits: tuple[AuditCommit, ...]) -> str:
    parts = ["<h2>Gate records</h2>"]
    for c in commits:
        parts.append(f'<section id="findings-{c.sha}"><h3><code>{c.sha[:12]}</code> {escape(c.subject)}</h3>')
        parts.append(
            f"<p>verdict on its own lines: {escape(c.verdict or 'none')}; {'checked' if c.checked else 'not checked'}"
            f", {'passed' if c.passed else 'not passed'}; at commit time: {escape(c.at_commit)}; checks recorded: "
            f"{c.checks}"
            + (f" (newest: {escape(c.checked_how)})" if c.checked_how else "")
            + (f"; {escape(c.note_problem)}" if c.note_problem else "")
            + "</p>"
        )
        if c.findings:
            items = "".join(
                f"<li><code>{escape(str(f.get('rule')))}</code> ({escape(str(f.get('severity')))}) "
                f"{escape(str(f.get('path') or ''))}{':' + str(f.get('line')) if f.get('line') else ''} "
                f"{escape(str(f.get('message') or ''))}</li>"
                for f in c.findings
            )
            parts.append(f"<ul>{items}</ul>")
        if c.range_findings:
            items = "".join(
                f"<li><code>{escape(str(f.get('rule')))}</code> ({escape(str(f.get('severity')))}) "
                f"{escape(str(f.get('message') or ''))}</li>"
                for f in c.range_findings
            )
            parts.append(f"<p>of the whole checked range:</p><ul>{items}</ul>")
        if c.waivers:
            items = "".join(
                f"<li>waiver <code>{escape(str(w.get('rule')))}</code> {escape(str(w.get('path')))}: "
                f"{escape(str(w.get('reason')))} ({escape(str(w.get('owner')))})</li>"
                for w in c.waivers
            )
            parts.append(f"<ul>{items}</ul>")
        parts.append("</section>")
    return "\n".join(parts)
