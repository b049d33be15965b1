"""Matrix view: requirements (grouped by loop and trace parent) x revisions.

The table never scrolls sideways by characters (that cut cells into misleading fragments such
as ``2222 [--]`` for ``0.002222 [--]``): it shows the requirement column and as many whole
revision columns as fit, and moving the cursor past either edge shifts that window by whole
columns.
"""

from __future__ import annotations

from rich.text import Text

from ...history.matrix import CAUTION
from textual.widgets import DataTable, Input, Static

from .. import bindings
from ..data import load_matrix
from ..widgets.verdict import cell_text, detail_text
from .base import ViewScreen

__all__ = ["MatrixScreen"]

STATUS_FILTERS = (None, "fail", "error", "stale", "pass", "unverified")

#: narrowest requirement column when long requirement labels are shortened (with an ellipsis)
MIN_REQ_WIDTH = 12


def column_window(widths, first: int, avail: int, want: int | None = None) -> tuple[int, int]:
    """Whole columns that fit: ``(first, stop)`` with ``widths[first:stop]`` summing to at most
    ``avail`` (at least one column when there is any), shifted so that column ``want`` is in it.

    Parameters
    ----------
    widths : sequence of int
        Rendered width of each column in cells (padding included).
    first : int
        First column wanted at the left edge.
    avail : int
        Cells available for the columns.
    want : int, optional
        A column that must be inside the window (the cursor's).
    """
    n = len(widths)
    if n == 0:
        return 0, 0
    first = min(max(first, 0), n - 1)
    if want is not None:
        want = min(max(want, 0), n - 1)
        first = min(first, want)

    def stop_from(f):
        used, k = 0, f
        while k < n and (k == f or used + widths[k] <= avail):
            used += widths[k]
            k += 1
        return k

    stop = stop_from(first)
    while want is not None and want >= stop:
        first += 1
        stop = stop_from(first)
    # fill a window that ends early (after shrinking or at the right end) from the left
    while first > 0 and sum(widths[first - 1:stop]) <= avail:
        first -= 1
    return first, stop


class MatrixTable(DataTable):
    """The matrix's table: left/right past the shown columns shift the column window."""

    def action_cursor_right(self) -> None:
        scr = self.screen
        if (self.cursor_column >= len(self.columns) - 1 and hasattr(scr, "shift_columns")
                and scr.shift_columns(+1)):
            return
        super().action_cursor_right()

    def action_cursor_left(self) -> None:
        scr = self.screen
        if self.cursor_column <= 1 and hasattr(scr, "shift_columns") and scr.shift_columns(-1):
            return
        super().action_cursor_left()


class MatrixScreen(ViewScreen):
    """Verification matrix with filters by status, loop and text."""

    BINDINGS = bindings.MATRIX

    def __init__(self, *a, **kw):
        super().__init__(*a, **kw)
        self.status_filter: str | None = None
        self.loop_filter: str | None = None
        self.text_filter = ""
        self.tips_only = False
        self._data = None
        #: first revision column shown (index into the data's columns) and the shown range
        self.first_col = 0
        self.shown = (0, 0)

    def compose(self):
        header, footer = self.header_footer()
        yield header
        yield Input(placeholder="filter: requirement ID, title or statement text (/ to edit)",
                    id="matrix-filter")
        yield Static("", id="matrix-status")
        yield MatrixTable(id="matrix-table", zebra_stripes=True, cursor_type="cell",
                          fixed_columns=1)
        yield Static("", id="matrix-detail")
        yield Static("", id="matrix-legend")
        yield footer

    def on_mount(self) -> None:
        self.query_one(DataTable).focus()
        self.query_one("#matrix-legend", Static).update(Text(
            "✓ pass  ✗ fail  ! error  ~ stale (older requirement, plant or engine)  ? unverified  "
            "· n/a  BROKE: failed where the parent passed; values in the limit's unit\n", style="dim").append("Caution: " + CAUTION, style="italic"))

    def fetch(self):
        return load_matrix(self.app.lg, self.loop_filter, tips_only=self.tips_only)

    def present(self, data) -> None:
        self._data = data
        self._fill()

    # -- filters ------------------------------------------------------------------------
    def visible_rows(self):
        d = self._data
        if d is None:
            return []
        rows = []
        text = self.text_filter.lower().strip()
        for r in d.rows:
            if text and text not in f"{r.key} {r.title} {r.statement}".lower():
                continue
            if self.status_filter:
                verdicts = [("unverified" if res is None else res.verdict)
                            for (k, _l, _c), res in d.cells.items() if k == r.key]
                if self.status_filter not in verdicts:
                    continue
            rows.append(r)
        return rows

    def _available_width(self, table) -> int:
        width = table.size.width or self.app.size.width
        # room for a vertical scrollbar whether or not it shows, so no column is ever cut
        return max(1, width - table.styles.scrollbar_size_vertical)

    def _fill(self, *, want_col: int | None = None) -> None:
        d = self._data
        if d is None:
            return
        table = self.query_one(DataTable)
        old = table.cursor_coordinate
        old_data_col = self.shown[0] + old.column - 1 if old.column >= 1 else None
        rows = self.visible_rows()
        req_cells = []
        for r in rows:
            parent = f" ({r.parents[0]})" if r.parents else ""
            req_cells.append(Text(f"{r.key}{parent} {r.limit_text}"))
        grid = []  # revision cells per row, every column
        for r in rows:
            cells = []
            for c in d.columns:
                applies = (r.key, c.loop, c.label) in d.cells
                res = d.cells.get((r.key, c.loop, c.label))
                cells.append(cell_text(res, applies=applies,
                                       broke=(r.key, c.loop, c.label) in d.broke))
            grid.append(cells)
        # a column header names its loop only where the loop changes (and on the first
        # column shown, below): "gantry-x/r3", "r4", "r5", ... keeps the columns narrow
        full = [f"{c.loop}/{c.label}" for c in d.columns]
        short = [full[j] if j == 0 or c.loop != d.columns[j - 1].loop else c.label
                 for j, c in enumerate(d.columns)]
        # explicit widths from the content: the table lays out once, the same way every time
        widths = [max([len(h)] + [row[j].cell_len for row in grid]) for j, h in enumerate(short)]
        spare = max((len(f) - len(h) for f, h in zip(full, short)), default=0)
        pad = 2 * table.cell_padding
        avail = self._available_width(table)
        req_w = max([len("requirement")] + [t.cell_len for t in req_cells])
        widest = max(widths, default=0) + pad
        req_w = min(req_w, max(MIN_REQ_WIDTH, avail - widest - pad))
        for t in req_cells:
            t.truncate(req_w, overflow="ellipsis")
        # which revision column the cursor should be on: the app's selection, else where it was
        if want_col is None:
            want = self.app.selection
            want_col = next((i for i, c in enumerate(d.columns) if (c.loop, c.label) == want),
                            old_data_col)
        first, stop = column_window([w + pad for w in widths], self.first_col,
                                    avail - req_w - pad - spare, want_col)
        self.first_col, self.shown = first, (first, stop)
        table.clear(columns=True)
        table.add_column("requirement", key="req", width=req_w)
        for j in range(first, stop):
            head = full[j] if j == first else short[j]
            table.add_column(head, key=full[j], width=max(widths[j], len(head)))
        for r, req_cell, cells in zip(rows, req_cells, grid):
            table.add_row(req_cell, *cells[first:stop], key=r.key)
        status = Text()
        status.append(f"columns: {'tips' if self.tips_only else 'all revisions'}   "
                      f"loop: {self.loop_filter or 'all'}   status: {self.status_filter or 'all'}"
                      f"   text: {self.text_filter or '-'}\n")
        status.append(f"{len(rows)} of {len(d.rows)} requirement(s)", style="dim")
        if stop - first < len(d.columns):
            more = " and ".join(w for w, yes in (("left", first > 0),
                                                 ("right", stop < len(d.columns))) if yes)
            status.append(f"; revisions {first + 1}-{stop} of {len(d.columns)} shown, more {more}",
                          style="bold")
        else:
            status.append(f", {len(d.columns)} revision(s)", style="dim")
        self.query_one("#matrix-status", Static).update(status)
        if rows and stop > first:
            row = min(old.row, len(rows) - 1)
            col = (want_col - first + 1) if want_col is not None and first <= want_col < stop else 1
            table.move_cursor(row=row, column=col)

    def shift_columns(self, step: int) -> bool:
        """Move the column window by one whole column (the cursor stays on the edge column);
        False when there is nothing more that way."""
        d = self._data
        if d is None:
            return False
        first, stop = self.shown
        if step > 0 and stop < len(d.columns):
            self._fill(want_col=stop)
            return True
        if step < 0 and first > 0:
            self.first_col = first - 1
            self._fill(want_col=first - 1)
            return True
        return False

    def on_resize(self, event) -> None:
        if self._data is not None:
            self.call_after_refresh(self._fill)

    # -- actions ------------------------------------------------------------------------
    def action_focus_filter(self) -> None:
        self.query_one(Input).focus()

    def action_focus_table(self) -> None:
        self.query_one(DataTable).focus()

    def on_input_changed(self, event: Input.Changed) -> None:
        self.text_filter = event.value
        if self._data is not None:
            self._fill()

    def on_input_submitted(self, event: Input.Submitted) -> None:
        self.query_one(DataTable).focus()

    def action_cycle_status(self) -> None:
        i = STATUS_FILTERS.index(self.status_filter)
        self.status_filter = STATUS_FILTERS[(i + 1) % len(STATUS_FILTERS)]
        self._fill()

    def action_cycle_loop(self) -> None:
        loops = (None,) + tuple(self._data.loops if self._data else ())
        i = loops.index(self.loop_filter) if self.loop_filter in loops else 0
        self.loop_filter = loops[(i + 1) % len(loops)]
        self.reload()

    def action_toggle_tips(self) -> None:
        self.tips_only = not self.tips_only
        self.reload()

    def selected(self):
        """(requirement ID, loop, label) under the cursor, or None."""
        table = self.query_one(DataTable)
        if self._data is None or table.row_count == 0:
            return None
        coord = table.cursor_coordinate
        key = table.coordinate_to_cell_key(coord).row_key.value
        j = self.shown[0] + max(coord.column, 1) - 1
        col = self._data.columns[j] if j < min(self.shown[1], len(self._data.columns)) else None
        return key, (col.loop if col else None), (col.label if col else None)

    def on_data_table_cell_highlighted(self, event: DataTable.CellHighlighted) -> None:
        sel = self.selected()
        if sel:
            self.app.current_req = sel[0]
            if sel[1]:
                self.app.current_loop, self.app.current_label = sel[1], sel[2]
        self._show_detail(sel)

    def _show_detail(self, sel) -> None:
        d, line = self._data, Text("")
        if d is not None and sel and sel[1]:
            k = (sel[0], sel[1], sel[2])
            line = detail_text(sel[0], f"{sel[1]}/{sel[2]}", d.cells.get(k),
                               broke=k in d.broke, applies=k in d.cells)
        elif sel:
            line = Text(f"{sel[0]}: move right onto a revision for its result", style="dim")
        self.query_one("#matrix-detail", Static).update(line)

    def on_data_table_cell_selected(self, event: DataTable.CellSelected) -> None:
        self.action_open_requirement()

    def action_open_requirement(self) -> None:
        sel = self.selected()
        if sel:
            self.app.current_req = sel[0]
            self.app.action_view("requirement")


