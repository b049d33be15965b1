"""Matrix view: requirements (grouped by loop and trace parent) x revisions."""

from __future__ import annotations

from rich.text import Text

from ...history.matrix import CAUTION
from textual.widgets import DataTable, Input, Static

from .. import bindings
from ..data import load_matrix
from ..widgets.verdict import cell_text
from .base import ViewScreen

__all__ = ["MatrixScreen"]

STATUS_FILTERS = (None, "fail", "error", "stale", "pass", "unverified")


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

    def compose(self):
        header, footer = self.header_footer()
        yield header
        yield Input(placeholder="filter: requirement ID, title or statement text (/ to edit)",
                    id="matrix-filter")
        yield Static("", id="matrix-status")
        yield DataTable(id="matrix-table", zebra_stripes=True, cursor_type="cell", fixed_columns=1)
        yield Static("", id="matrix-legend")
        yield footer

    def on_mount(self) -> None:
        self.query_one(DataTable).focus()
        self.query_one("#matrix-legend", Static).update(Text(
            "✓ pass  ✗ fail  ! error  ~ stale (older requirement/plant version)  ? unverified  "
            "· n/a   headroom +++ ≥50% ++ ≥20% + ≥0 - short <20% -- short more   BROKE = failed "
            "where the parent revision passed\n", style="dim").append("Caution: " + CAUTION, style="italic"))

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

    def _fill(self) -> None:
        d = self._data
        table = self.query_one(DataTable)
        old = table.cursor_coordinate
        table.clear(columns=True)
        rows = self.visible_rows()
        grid = []
        for r in rows:
            parent = f" ({r.parents[0]})" if r.parents else ""
            cells = [Text(f"{r.key}{parent} {r.limit_text}")]
            for c in d.columns:
                applies = (r.key, c.loop, c.label) in d.cells
                res = d.cells.get((r.key, c.loop, c.label))
                cells.append(cell_text(res, applies=applies,
                                       broke=(r.key, c.loop, c.label) in d.broke))
            grid.append(cells)
        # explicit widths from the content: the table lays out once, the same way every time
        headers = ["requirement"] + [f"{c.loop}/{c.label}" for c in d.columns]
        keys = ["req"] + [f"{c.loop}/{c.label}" for c in d.columns]
        for j, (head, key) in enumerate(zip(headers, keys)):
            width = max([len(head)] + [row[j].cell_len for row in grid])
            table.add_column(head, key=key, width=width)
        for r, cells in zip(rows, grid):
            table.add_row(*cells, key=r.key)
        status = Text()
        status.append(f"columns: {'tips' if self.tips_only else 'all revisions'}   "
                      f"loop: {self.loop_filter or 'all'}   status: {self.status_filter or 'all'}"
                      f"   text: {self.text_filter or '-'}   ")
        status.append(f"{len(rows)} of {len(d.rows)} requirement(s), {len(d.columns)} revision(s)",
                      style="dim")
        self.query_one("#matrix-status", Static).update(status)
        if rows:
            row = min(old.row, len(rows) - 1)
            col = old.column
            want = (self.app.current_loop, self.app.current_label)
            for i, c in enumerate(d.columns):
                if (c.loop, c.label) == want:
                    col = i + 1
            table.move_cursor(row=row, column=min(max(col, 1), len(d.columns)))

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
        col = self._data.columns[max(coord.column, 1) - 1] if self._data.columns else None
        return key, (col.loop if col else None), (col.label if col else None)

    def on_data_table_cell_highlighted(self, event: DataTable.CellHighlighted) -> None:
        sel = self.selected()
        if sel:
            self.app.current_req = sel[0]
            if sel[1]:
                self.app.current_loop, self.app.current_label = sel[1], sel[2]

    def on_data_table_cell_selected(self, event: DataTable.CellSelected) -> None:
        self.action_open_requirement()

    def action_open_requirement(self) -> None:
        sel = self.selected()
        if sel:
            self.app.current_req = sel[0]
            self.app.action_view("requirement")


