"""XLSX export of the verification matrix (openpyxl).

A ``Summary`` sheet (title, generation time, the caution, counts by verdict per loop) and one
sheet per loop with a row per (requirement, revision).  Verdict cells are filled with a colour
of our own palette, and the verdict word is always in the cell (colour is never the only
cue).  Every loop sheet has a frozen header row holding the documented column names
(``docs/exports.md``, the same as the CSV and JSON keys), an auto-filter, column widths fitted
to the content, numbers as numbers (infinities as the text ``inf``), ``verified_at`` as a real
date-time (UTC, without zone: XLSX has none), and a print set-up: landscape, fitted to one page
width, the header row repeated on every page, the used range as the print area.
"""

from __future__ import annotations

import math
import re
from datetime import timezone
from pathlib import Path

from ..text import cell_safe, printable
from .rows import require, COLUMNS, VERDICT_ORDER, matrix_rows, verdict_counts, write_atomic

__all__ = ["export_xlsx", "VERDICT_FILLS", "sheet_name"]

#: Fill colour (RGB hex) per verdict word: soft green, coral, amber, slate blue, light grey.
VERDICT_FILLS = {
    "pass": "C8E6C9",
    "fail": "F4B6A6",
    "error": "FFE08A",
    "stale": "C5CAE9",
    "unverified": "E0E0E0",
    "waived": "D9C8F0",   # the state of a fail or error a live waiver covers: soft lilac
}

_BAD_SHEET_CHARS = re.compile(r"[\[\]:*?/\\]")


def sheet_name(loop: str, taken: set[str]) -> str:
    """A valid, unique sheet name (<= 31 characters, none of ``[]:*?/\\``) for a loop."""
    base = _BAD_SHEET_CHARS.sub("_", printable(loop).replace("\t", " ").replace("\n", " ")
                                .replace("\r", " "))[:31].strip("'") or "loop"
    name, i = base, 2
    while name.lower() in taken or name.lower() == "summary":
        suffix = f"~{i}"
        name = base[:31 - len(suffix)] + suffix
        i += 1
    taken.add(name.lower())
    return name


def _cell_value(v, column: str = ""):
    """openpyxl cell value: infinities as the text 'inf'/'-inf' (XLSX has no infinity);
    ``verified_at`` as a naive UTC datetime; text with characters a workbook cannot hold
    (openpyxl's ILLEGAL_CHARACTERS_RE, XML's forbidden ones) escaped as \\uXXXX
    (ledger/text.py)."""
    if isinstance(v, float) and math.isinf(v):
        return "inf" if v > 0 else "-inf"
    if column == "verified_at":
        if not v:
            return None
        from datetime import datetime, timezone

        return datetime.fromisoformat(v).astimezone(timezone.utc).replace(tzinfo=None)
    return cell_safe(v)


def _print_setup(sh, ncols: int) -> None:
    from openpyxl.utils import get_column_letter

    sh.page_setup.orientation = "landscape"
    sh.page_setup.paperSize = sh.PAPERSIZE_A4
    sh.page_setup.fitToWidth = 1
    sh.page_setup.fitToHeight = 0
    sh.sheet_properties.pageSetUpPr.fitToPage = True
    sh.print_title_rows = "1:1"
    sh.print_area = f"A1:{get_column_letter(ncols)}{max(sh.max_row, 1)}"


def export_xlsx(matrix, path) -> Path:
    """Write the matrix as an XLSX workbook.

    Parameters
    ----------
    matrix : ledger.history.matrix.Matrix
    path : str or Path

    Returns
    -------
    Path
    """
    require("openpyxl")
    from openpyxl import Workbook
    from openpyxl.styles import Alignment, Font, PatternFill
    from openpyxl.utils import get_column_letter

    rows = matrix_rows(matrix)
    wb = Workbook()
    ws = wb.active
    ws.title = "Summary"
    bold = Font(bold=True)
    ws["A1"] = cell_safe(matrix.title)
    ws["A1"].font = Font(bold=True, size=14)
    ws["A2"] = "Generated (UTC)"
    ws["B2"] = matrix.generated_at.astimezone(timezone.utc).replace(tzinfo=None, microsecond=0)
    ws["B2"].number_format = "yyyy-mm-dd hh:mm:ss"
    ws["A3"] = "Caution"
    ws["B3"] = matrix.caution
    ws["A3"].font = bold
    ws["B3"].font = Font(bold=True, color="9C2A00")
    ws["B3"].alignment = Alignment(wrap_text=True, vertical="top")
    ws.row_dimensions[3].height = 45
    states = VERDICT_ORDER + ("waived",)
    head = ["Loop", "Revisions"] + [v.capitalize() for v in states] + ["Total"]
    ws.append([])
    ws.append(head)
    for c in ws[5]:
        c.font = bold
    for loop in matrix.loops:
        counts = verdict_counts(rows, loop)
        labels = ", ".join(c.label for c in matrix.columns if c.loop == loop)
        ws.append([cell_safe(loop), cell_safe(labels)] + [counts.get(v, 0) for v in states]
                  + [sum(counts.values())])
    total = verdict_counts(rows)
    ws.append(["All loops", ""] + [total.get(v, 0) for v in states] + [sum(total.values())])
    for c in ws[ws.max_row]:
        c.font = bold
    # colour the verdict header cells with the same palette, word kept in the cell
    for j, v in enumerate(states):
        ws.cell(row=5, column=3 + j).fill = PatternFill("solid", fgColor=VERDICT_FILLS[v])
    ws.column_dimensions["A"].width = 18
    ws.column_dimensions["B"].width = 60
    for j in range(len(states) + 1):
        ws.column_dimensions[get_column_letter(3 + j)].width = 12
    _print_setup(ws, 3 + len(states))

    taken: set[str] = set()
    vcol = COLUMNS.index("verdict") + 1
    scol = COLUMNS.index("state") + 1
    for loop in matrix.loops:
        sh = wb.create_sheet(sheet_name(loop, taken))
        sh.append(list(COLUMNS))
        for c in sh[1]:
            c.font = bold
        widths = [len(c) for c in COLUMNS]
        tcol = COLUMNS.index("verified_at") + 1
        for r in rows:
            if r.loop != loop:
                continue
            values = [_cell_value(getattr(r, c), c) for c in COLUMNS]
            sh.append(values)
            for j, v in enumerate(values):
                widths[j] = max(widths[j], len(str(v)) if v is not None else 0)
            sh.cell(row=sh.max_row, column=tcol).number_format = "yyyy-mm-dd hh:mm:ss"
            cell = sh.cell(row=sh.max_row, column=vcol)
            cell.fill = PatternFill("solid", fgColor=VERDICT_FILLS.get(r.verdict, "FFFFFF"))
            cell.font = bold
            cell = sh.cell(row=sh.max_row, column=scol)
            cell.fill = PatternFill("solid", fgColor=VERDICT_FILLS.get(r.state, "FFFFFF"))
            cell.font = bold
        sh.freeze_panes = "A2"
        sh.auto_filter.ref = f"A1:{get_column_letter(len(COLUMNS))}{max(sh.max_row, 1)}"
        for j, w in enumerate(widths):
            sh.column_dimensions[get_column_letter(j + 1)].width = min(max(w + 2, 8), 60)
        _print_setup(sh, len(COLUMNS))
    wb.properties.title = cell_safe(matrix.title)
    wb.properties.description = matrix.caution
    return write_atomic(path, lambda tmp: wb.save(tmp))
