"""What drives the worst value in the HTML evidence: per entry, the ranking of the toleranced
plant parameters by value change per tolerance width (:mod:`ledger.verification.drivers`,
computed for the report, stored nowhere), with the corner directions and the method line."""

from __future__ import annotations

import html

__all__ = ["drivers_evidence_html"]


def _column(lg, loop: str, label: str, cache: dict):
    from ..errors import LedgerError
    from ..verification.drivers import worst_case_drivers

    key = (loop, label)
    if key not in cache:
        try:
            cache[key] = {d.requirement: d for d in worst_case_drivers(lg, loop, label)}
        except LedgerError as e:
            cache[key] = e
    return cache[key]


def drivers_evidence_html(lg, entry, cache: dict) -> str:
    """The "what drives the worst value" part of one evidence entry (``""`` when the entry
    has no current result to trace); ``cache`` holds each revision's drivers between
    entries (one computation per revision column)."""
    from ..driversview import COLUMNS, corner_line, effect_rows, method_line, summary

    e = html.escape
    if entry.result is None or entry.verdict in ("stale", "unverified"):
        return ""
    col = _column(lg, entry.loop, entry.revision.label, cache)
    head = "<h4>What drives the worst value</h4>"
    if not isinstance(col, dict):
        return f"{head}<p class='note'>Cannot tell: {e(str(col))}</p>"
    d = col.get(entry.requirement.key)
    if d is None:
        return ""
    if not d.effects:
        return f"{head}<p class='note'>{e(d.note)}</p>"
    out = [head]
    line = corner_line(d)
    if line:
        out.append(f"<p>{e(line)}.</p>")
    out.append(f"<p><b>{e(summary(d))}</b>.</p>")
    rows = effect_rows(d)
    keep = [j for j, c in enumerate(COLUMNS) if c != "note" or any(r[j] for r in rows)]
    out.append("<table class='drivers'><tr>" + "".join(f"<th>{e(COLUMNS[j])}</th>" for j in keep)
               + "</tr>")
    for row in rows:
        out.append("<tr>" + "".join(f"<td>{e(row[j])}</td>" for j in keep) + "</tr>")
    out.append("</table>")
    if d.note:
        out.append(f"<p class='note'>{e(d.note)}</p>")
    out.append(f"<p class='meta'>{e(method_line(d))}.</p>")
    return "".join(out)
