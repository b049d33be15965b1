"""HTML sign-off report of the verification matrix: one self-contained file.

Summary first (title, time, the caution in a box, counts by verdict per loop, the revisions
with their rationale), then the matrix table (requirements x revisions, verdict word and
value in each cell), then one evidence section per entry with its fields and its figure
(inline SVG from :mod:`ledger.exports.plots`); an entry on the loop gain also gets the Nyquist
plot and Nichols chart of the whole plant family with its worst variant highlighted
(:mod:`ledger.exports.loopplots`; one figure per revision and worst variant, later entries
link to it).  No external resources (no scripts, fonts or
style sheets from elsewhere).  Print CSS puts each evidence section on a new page and keeps a
figure with its heading, so printing to PDF gives a readable document.  All text is escaped.
"""

from __future__ import annotations

import html
import math
from pathlib import Path

import numpy as np

from ..text import printable
from ..errors import LedgerError
from .rows import VERDICT_ORDER, matrix_rows, number_text, verdict_counts, write_atomic

__all__ = ["export_html", "render_html", "VERDICT_COLOURS"]

#: Background colour of a verdict word in the report (the word is always printed too).
VERDICT_COLOURS = {"pass": "#c8e6c9", "fail": "#f4b6a6", "error": "#ffe08a",
                   "stale": "#c5cae9", "unverified": "#e0e0e0", "waived": "#d9c8f0"}

_CSS = """
body { font-family: "DejaVu Sans", Arial, sans-serif; font-size: 11pt; color: #1b1b1b;
       margin: 24px 32px; line-height: 1.35; }
h1 { font-size: 20pt; margin: 0 0 4px 0; }
h2 { font-size: 14pt; border-bottom: 2px solid #333; padding-bottom: 2px; margin-top: 22px; }
h3 { font-size: 12.5pt; margin: 0 0 6px 0; }
.meta { color: #444; font-size: 9.5pt; }
.caution { border: 3px solid #9c2a00; background: #fff4ec; padding: 10px 14px; margin: 14px 0;
           font-weight: bold; font-size: 11.5pt; color: #6b1d00; }
table { border-collapse: collapse; margin: 6px 0 12px 0; }
th, td { border: 1px solid #999; padding: 3px 7px; vertical-align: top; font-size: 9.5pt; }
th { background: #eceff1; text-align: left; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
.v { font-weight: bold; padding: 1px 6px; border-radius: 3px; white-space: nowrap; }
.v-pass { background: #c8e6c9; } .v-fail { background: #f4b6a6; }
.v-error { background: #ffe08a; } .v-stale { background: #c5cae9; }
.v-unverified { background: #e0e0e0; } .v-waived { background: #d9c8f0; }
table.fields th { width: 150px; }
.figure svg { max-width: 100%; height: auto; }
.note { color: #7a4b00; font-style: italic; }
.evidence { margin-top: 26px; border-top: 1px solid #bbb; padding-top: 10px; }
@media print {
  body { margin: 0; font-size: 10pt; }
  .evidence, .evidence-head { break-before: page; page-break-before: always; border-top: none; }
  .evidence-head + .evidence { break-before: auto; page-break-before: auto; }
  .figure, table { break-inside: avoid; page-break-inside: avoid; }
  h2, h3 { break-after: avoid; page-break-after: avoid; }
  .caution { -webkit-print-color-adjust: exact; print-color-adjust: exact; }
  .v, th { -webkit-print-color-adjust: exact; print-color-adjust: exact; }
}
@page { size: A4; margin: 14mm; }
"""


def _e(x) -> str:
    # control characters of hostile stored text become a visible \uXXXX (ledger/text.py)
    return html.escape(printable(x), quote=True)


def _verdict(word: str) -> str:
    return f'<span class="v v-{_e(word)}">{_e(word)}</span>'


def value_text(value, unit, limit_text):
    from ..display import value_text as _vt

    return _vt(value, unit, limit_text) if value is not None else ""


def _val(x, unit="") -> str:
    if x is None:
        return ""
    u = f" {unit}" if unit and unit not in ("ratio", "bool") else ""
    return _e(number_text(x, digits=6) + u)


def _first_line(text: str, n: int = 90) -> str:
    line = (text or "").strip().splitlines()[0] if (text or "").strip() else ""
    return line if len(line) <= n else line[: n - 1] + "..."


def _summary(matrix, rows) -> list[str]:
    out = ["<h2>Summary</h2>", "<table><tr><th>Loop</th><th>Revisions</th>"]
    out += [f"<th>{_verdict(v)}</th>" for v in VERDICT_ORDER + ("waived",)] + \
        ["<th>Total</th></tr>"]
    for loop in matrix.loops:
        c = verdict_counts(rows, loop)
        labels = ", ".join(col.label for col in matrix.columns if col.loop == loop)
        out.append(f"<tr><td>{_e(loop)}</td><td>{_e(labels)}</td>"
                   + "".join(f'<td class="num">{c[v]}</td>' for v in VERDICT_ORDER)
                   + f'<td class="num">{c.get("waived", 0)}</td>'
                   + f'<td class="num">{sum(c.values())}</td></tr>')
    c = verdict_counts(rows)
    out.append("<tr><th>All loops</th><th></th>"
               + "".join(f'<th class="num">{c[v]}</th>' for v in VERDICT_ORDER)
               + f'<th class="num">{c.get("waived", 0)}</th>'
               + f'<th class="num">{sum(c.values())}</th></tr></table>')
    out.append("<h2>Revisions</h2><table><tr><th>Loop</th><th>Revision</th><th>Parent</th>"
               "<th>Author</th><th>Recorded (UTC)</th><th>Rationale</th><th>Controller</th>"
               "<th>Content hash</th></tr>")
    for col in matrix.columns:
        ctl = f"<code>{_e(col.controller)}</code>"
        if col.discretization:
            ctl += f"<br>discretised: {_e(col.discretization)}"
        if col.number_format:
            ctl += f"<br>coefficients: {_e(col.number_format)}"
        if col.verified:
            ctl += f"<br>verified as <code>{_e(col.verified)}</code>"
        out.append(f"<tr><td>{_e(col.loop)}</td><td>{_e(col.label)}</td><td>{_e(col.parent or '')}"
                   f"</td><td>{_e(col.author)}</td><td>{_e(col.created_at.strftime('%Y-%m-%d %H:%M'))}"
                   f"</td><td>{_e(_first_line(col.rationale))}</td><td>{ctl}</td>"
                   f"<td><code>{_e(col.content_hash[:12])}</code></td></tr>")
    out.append("</table>")
    return out


def _matrix_table(matrix) -> list[str]:
    out = ["<h2>Verification matrix</h2>", "<table><tr><th>Requirement</th><th>Limit</th>"]
    out += [f"<th>{_e(c.loop)}/{_e(c.label)}</th>" for c in matrix.columns] + ["</tr>"]
    for q in matrix.requirements:
        if not q.metric:
            continue
        cells = []
        for c in matrix.columns:
            e = matrix.cell(q.key, c.loop, c.label)
            if e is None:
                cells.append('<td class="note">n/a</td>')
                continue
            r = e.result
            cells.append(f"<td>{_verdict(e.state)} "
                         f"{_e(value_text(r.value, r.unit, q.limit_text)) if r else ''}</td>")
        out.append(f"<tr><td><b>{_e(q.key)}</b> v{q.version}<br>{_e(q.title)}</td>"
                   f"<td>{_e(q.limit_text)}<br><span class='meta'>{_e(q.metric)}</span></td>"
                   + "".join(cells) + "</tr>")
    out.append("</table>")
    needs = [q for q in matrix.requirements if not q.metric]
    if needs:
        out.append("<p class='meta'>Needs without a metric (verified through the requirements "
                   "derived from them): " + ", ".join(_e(q.key) for q in needs) + ".</p>")
    return out


def _yield_html(row) -> str:
    """The lower confidence bound beside the pass fraction (docs/history.md), with the sample
    counts and the yield target when the requirement states one."""
    if not row.yield_shown or row.yield_shown == "-":
        return ""
    text = _e(row.yield_shown)
    if row.yield_bound is not None:
        text += (f" <span class='meta'>(one-sided Clopper-Pearson lower bound; "
                 f"{row.sample_passes} of {row.samples} random samples pass)</span>")
    elif row.yield_shown == "no samples":
        text += " <span class='meta'>(no random samples: corners and models give no bound)</span>"
    if row.yield_target is not None:
        from ..yieldbound import yield_text

        text += (f"<br>target {_e(yield_text(row.yield_target, row.yield_confidence))}, "
                 f"judged on the bound; {row.samples_needed} passing samples with none failing "
                 "support it")
    return text


def _fields(entry, row) -> str:
    q, r = entry.requirement, entry.result
    pairs = [("Statement", _e(q.statement)), ("Rationale", _e(q.rationale)),
             ("Method", _e(q.method)), ("Status", _e(q.status)),
             ("Metric", _e(q.metric)), ("Limit", _e(q.limit_text)),
             ("Verdict", _verdict(entry.verdict)),
             ("Waiver", _waiver_html(row)),
             ("Value (worst case)", _e(row.value_shown)
              + (f" <span class='meta'>({_val(row.value, row.unit)})</span>"
                 if row.value is not None and row.value_shown != _val(row.value, row.unit) else "")),
             ("Headroom", _e(row.headroom_shown)),
             ("Worst variant", _e(row.worst_variant)
              + (" <span class='meta'>(a measured member)</span>" if row.worst_measured else "")),
             ("Measured members", _e(row.measured_members)),
             ("Variants passing", (_e(number_text(100 * row.pass_fraction, digits=4)) + " %"
                                   if row.pass_fraction is not None else "")
              + (f" of {row.variants} plant variants" if row.variants else "")),
             ("Yield bound", _yield_html(row)),
             ("Derives from", _e(", ".join(q.parents))),
             ("Judged version", _e(row.judged_version)),
             ("Plant version", _e(row.plant_version)),
             ("Verified at (UTC)", _e(row.verified_at)),
             ("Engine version", _e(row.engine_version))]
    if r is not None and r.reason:
        pairs.append(("Reason", _e(r.reason)))
    return ("<table class='fields'>" + "".join(f"<tr><th>{k}</th><td>{v}</td></tr>"
                                              for k, v in pairs if v) + "</table>")


def _waiver_html(row) -> str:
    """The waiver covering a cell: id, approver, role, reason, until when ("" when none)."""
    if row.state != "waived":
        return ""
    until = "; ".join(x for x in (f"until {row.waiver_expires}" if row.waiver_expires else "",
                                  row.waiver_condition) if x) or "no expiry date or condition"
    return (f"{_e(row.verdict)} accepted by waiver {_e(row.waiver)}, approved by "
            f"{_e(row.waiver_approver)} ({_e(row.waiver_role)}): {_e(row.waiver_reason)} "
            f"<span class='meta'>({_e(until)})</span>")


#: figure kinds whose entries get the family's Nyquist and Nichols views
FAMILY_VIEW_KINDS = ("bode", "sensitivity", "disk", "fit")


def _family_views(entry, views, drawn: dict, funit: str) -> str:
    """The Nyquist and Nichols figure of an entry on the loop gain (once per revision and
    highlighted member; later entries link to it), or ``""``."""
    from .loopplots import family_figure
    from .plots import _svg, figure_kind

    if figure_kind(entry.requirement.metric) not in FAMILY_VIEW_KINDS:
        return ""
    if isinstance(views, LedgerError):
        return f"<p class='note'>No Nyquist or Nichols view: {_e(views)}</p>"
    worst = entry.result.worst_variant if entry.result is not None else None
    hl = views.highlight(worst)
    key = (entry.loop, entry.revision.label, hl)
    if key in drawn:
        return (f"<p class='meta'>Nyquist and Nichols views of this revision with {_e(hl)} "
                f"highlighted: see <a href='#{_e(drawn[key])}'>above</a>.</p>")
    anchor = f"family--{entry.loop}--{entry.revision.label}--{len(drawn)}"
    drawn[key] = anchor
    why = ("the worst variant of this requirement" if hl == worst else
           "the member with the smallest disk margin")
    try:
        with np.errstate(all="ignore"):
            svg = _svg(family_figure(views, hl, frequency_unit=funit))
    except LedgerError as e:
        return f"<p class='note'>No Nyquist or Nichols view: {_e(e)}</p>"
    return (f"<div class='figure family-views' id='{_e(anchor)}'><p class='meta'>Nyquist and "
            f"Nichols views of every member drawn; highlighted: {_e(hl)} ({why}).</p>"
            f"{svg}</div>")


def render_html(matrix, lg) -> str:
    """The report as one HTML string.

    Parameters
    ----------
    matrix : ledger.history.matrix.Matrix
    lg : Ledger
        The ledger the matrix came from; its revisions are rebuilt to draw the curves.
    """
    from ..curves import column_curves
    from ..loopviews import loop_views
    from ..prefs import frequency_unit
    from .plots import entry_figure, figure_kind
    from .drivershtml import drivers_evidence_html
    from .rmsplot import rms_evidence_html

    funit = frequency_unit(getattr(lg, "url", ""))  # the reader's choice for this ledger
    rows = matrix_rows(matrix)
    out = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
           f"<title>{_e(matrix.title)}</title>", f"<style>{_CSS}</style></head><body>",
           f"<h1>{_e(matrix.title)}</h1>",
           f"<p class='meta'>Generated {_e(matrix.generated_at.isoformat(timespec='seconds'))}"
           f" from {_e(getattr(lg, 'display_url', ''))}. {len(matrix.columns)} revision(s), "
           f"{len(matrix.loops)} loop(s), {len(rows)} entries.</p>",
           f"<div class='caution'>Caution: {_e(matrix.caution)}</div>"]
    out += _summary(matrix, rows)
    out += _matrix_table(matrix)
    out.append("<div class='evidence-head'><h2>Evidence</h2><p class='meta'>One section per "
               "entry: the ledger's result and the curves of the nominal plant and the worst "
               "variant, recomputed from the revision for display (the verdict is the "
               "ledger's), and what drives the worst value (the slope in each toleranced "
               "plant parameter at the worst variant, computed for this report).</p></div>")
    cache: dict = {}
    drivers: dict = {}
    views_cache: dict = {}
    drawn: dict = {}  # (loop, label, highlighted member) -> anchor of its family figure
    for entry, row in zip(matrix.entries, rows):
        key = (entry.loop, entry.revision.label)
        if key not in cache:
            worst = {e.result.worst_variant for e in matrix.entries
                     if (e.loop, e.revision.label) == key and e.result is not None}
            try:
                cache[key] = column_curves(lg, *key, worst=worst)
            except LedgerError as e:
                cache[key] = e
        q = entry.requirement
        if key not in views_cache and figure_kind(q.metric) in FAMILY_VIEW_KINDS:
            worst = {e.result.worst_variant for e in matrix.entries
                     if (e.loop, e.revision.label) == key and e.result is not None}
            try:  # every member's loop gain: only for revisions with entries on it
                with np.errstate(all="ignore"):
                    views_cache[key] = loop_views(lg, *key, wanted=worst)
            except LedgerError as e:
                views_cache[key] = e
        out.append(f"<section class='evidence' id='{_e(q.key)}--{_e(entry.loop)}--"
                   f"{_e(entry.revision.label)}'>")
        out.append(f"<h3>{_e(q.key)} v{q.version}: {_e(q.title)} &mdash; {_e(entry.loop)}/"
                   f"{_e(entry.revision.label)} &mdash; {_verdict(entry.state)}</h3>")
        out.append(_fields(entry, row))
        if entry.verdict == "stale":
            out.append("<p class='note'>Stale: the result judged an older requirement or plant "
                       "version, or another engine computed it; the curves below use the "
                       "latest plant version.</p>")
        curves = cache[key]
        views = views_cache.get(key)
        views = None if isinstance(views, LedgerError) else views
        if isinstance(curves, LedgerError):
            out.append(f"<p class='note'>No figure: {_e(curves)}</p>")
        else:
            try:
                with np.errstate(all="ignore"):
                    svg = entry_figure(curves, q, entry.result, frequency_unit=funit,
                                       views=views)
                out.append(f"<div class='figure'>{svg}</div>")
            except LedgerError as e:
                out.append(f"<p class='note'>No figure: {_e(e)}</p>")
        if key in views_cache:
            out.append(_family_views(entry, views_cache[key], drawn, funit))
        out.append(rms_evidence_html(lg, entry))  # rms budgets: table and cumulative rms
        out.append(drivers_evidence_html(lg, entry, drivers))  # what drives the worst value
        out.append("</section>")
    out.append(f"<p class='caution'>Caution: {_e(matrix.caution)}</p></body></html>")
    return "\n".join(out)


def export_html(matrix, path, lg) -> Path:
    """Write the HTML report (one self-contained file).

    Parameters
    ----------
    matrix : ledger.history.matrix.Matrix
    path : str or Path
    lg : Ledger
        The ledger the matrix was built from (needed for the curves).

    Returns
    -------
    Path
    """
    text = printable(render_html(matrix, lg))  # and anything that reached the figures
    return write_atomic(path, lambda tmp: tmp.write_text(text, encoding="utf-8"))
