"""Diff view: pick two revisions of a loop; broke / fixed / eroded / improved lists with
values and deltas."""

from __future__ import annotations

from rich.text import Text
from textual.containers import Horizontal, VerticalScroll
from textual.widgets import Label, Select, Static

from .. import bindings
from ...display import delta_text
from ..widgets.verdict import SYMBOL, fmt_value
from .base import ViewScreen

__all__ = ["DiffScreen"]

_HEAD = {"broke": "BROKE (pass -> fail)", "fixed": "FIXED (fail -> pass)",
         "eroded": "ERODED (still pass, less headroom)", "improved": "IMPROVED (more headroom)",
         "moved": "moved (still fail, value moved beyond the threshold)",
         "new": "new (judged on the newer one only)", "dropped": "dropped (older one only)",
         "incomparable": "incomparable (error or stale on a side)", "unchanged": "unchanged"}
_STYLE = {"broke": "bold red", "fixed": "bold green", "eroded": "yellow", "improved": "green",
          "moved": "yellow", "new": "cyan", "dropped": "cyan", "incomparable": "magenta", "unchanged": "dim"}
_ORDER = ("broke", "fixed", "eroded", "improved", "moved", "incomparable", "new", "dropped",
          "unchanged")


class DiffScreen(ViewScreen):
    """Regressions between two revisions of the current loop."""

    BINDINGS = bindings.DIFF

    def __init__(self, *a, **kw):
        super().__init__(*a, **kw)
        self.old_label: str | None = None
        self.new_label: str | None = None
        self.comparison = None
        self._loop = None
        self._sel = (None, None)  # the app's selection this comparison was made for
        self._quiet = False

    def compose(self):
        header, footer = self.header_footer()
        yield header
        with Horizontal(id="diff-pick"):
            yield Label("older", classes="pick-label")
            yield Select([], id="diff-old", allow_blank=True, prompt="older revision")
            yield Label("newer", classes="pick-label")
            yield Select([], id="diff-new", allow_blank=True, prompt="newer revision")
        with VerticalScroll():
            yield Static("", id="diff-body")
        yield footer

    def fetch(self):
        lg = self.app.lg
        sel_loop, sel_label = self.app.selection
        loop = sel_loop or next((l.name for l in lg.loops()), None)
        if loop is None:
            return None
        revs = lg.revisions(loop)
        if (loop, sel_label) != self._sel:
            # the selection moved (another loop, another revision): compare what is selected now,
            # never a pick left over from an earlier selection
            self.old_label = self.new_label = None
        labels = {r.label for r in revs}
        new = self.new_label or (sel_label if sel_label in labels
                                 else (revs[-1].label if revs else None))
        if new is None:
            return (loop, sel_label, revs, None, None, None)
        parent = next(r.parent for r in revs if r.label == new)
        old = self.old_label if self.old_label in labels else parent
        if old is None or old == new:
            return (loop, sel_label, revs, old, new, None)
        from ...history.diff import diff

        return (loop, sel_label, revs, old, new, diff(lg, loop, new, old))

    def present(self, data) -> None:
        body = self.query_one("#diff-body", Static)
        if data is None:
            body.update("No loops yet.")
            return
        loop, sel_label, revs, old, new, cmp_ = data
        self._loop, self.old_label, self.new_label, self.comparison = loop, old, new, cmp_
        self._sel = (loop, sel_label)
        opts = [(f"{loop}/{r.label}", r.label) for r in revs]
        self._quiet = True
        for sel_id, value in (("#diff-old", old), ("#diff-new", new)):
            sel = self.query_one(sel_id, Select)
            sel.set_options(opts)
            if value is not None:
                sel.value = value
        self.call_after_refresh(self._unquiet)
        if cmp_ is None:
            body.update(f"loop {loop}: pick two different revisions (the newer one has no parent).")
            return
        t = Text()
        t.append(f"loop {loop}: {cmp_.old.label} -> {cmp_.new.label}  "
                 f"(eroded/improved: headroom change beyond {cmp_.threshold:.0%})\n\n",
                 style="bold")
        for part, a, b in cmp_.design_changes:
            t.append(f"{part}: {a}  ->  {b}\n")
        if cmp_.design_changes:
            t.append("\n")
        for kind in _ORDER:
            items = cmp_.of(kind)
            if not items and kind in ("moved", "new", "dropped", "incomparable"):
                continue
            t.append(f"{_HEAD[kind]}: {len(items)}\n", style=_STYLE[kind])
            for c in items:
                ov, nv = c.old_verdict or "n/a", c.new_verdict or "n/a"
                t.append(f"  {c.requirement:<12} {SYMBOL.get(ov, '?')} {ov}"
                         f" -> {SYMBOL.get(nv, '?')} {nv:<6} "
                         f"{fmt_value(c.old_value, c.unit, c.limit_text)} -> "
                         f"{fmt_value(c.new_value, c.unit, c.limit_text)}")
                if c.value_delta is not None:
                    t.append(f"  (delta {delta_text(c.old_value, c.new_value, c.unit, c.limit_text)})")
                t.append(f"  limit {c.limit_text}\n")
            t.append("\n")
        body.update(t)

    def _unquiet(self) -> None:
        self._quiet = False

    def on_select_changed(self, event: Select.Changed) -> None:
        if self._quiet or event.value is Select.BLANK:
            return
        if event.select.id == "diff-old":
            self.old_label = event.value
        else:
            self.new_label = event.value
            # picking the newer revision moves the shared selection (same loop)
            self.app.current_loop, self.app.current_label = self._loop, event.value
            self._sel = (self._loop, event.value)
        self.reload()

    def action_compare(self) -> None:
        self.reload()
