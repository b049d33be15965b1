"""Lineage view: each loop's revision tree with verdict counts; the selected revision's
rationale and controller beside it."""

from __future__ import annotations

from rich.text import Text
from textual.containers import Horizontal, VerticalScroll
from textual.widgets import Static, Tree

from ..data import load_lineage
from ..widgets.verdict import counts_text
from .base import ViewScreen

__all__ = ["LineageScreen"]


def _first_line(text: str, n: int = 48) -> str:
    line = (text or "").strip().splitlines()[0] if (text or "").strip() else ""
    return line if len(line) <= n else line[: n - 1] + "…"


class LineageScreen(ViewScreen):
    """Revision trees of every loop."""

    def compose(self):
        header, footer = self.header_footer()
        yield header
        with Horizontal():
            yield Tree("loops", id="lineage-tree")
            with VerticalScroll(id="lineage-side"):
                yield Static("", id="lineage-detail")
        yield footer

    def on_mount(self) -> None:
        self.query_one(Tree).show_root = False
        self.query_one(Tree).focus()

    def fetch(self):
        return load_lineage(self.app.lg)

    def present(self, data) -> None:
        tree = self.query_one(Tree)
        tree.clear()
        self._rows = {}
        self._tips = dict(data.tips)
        want = self.app.selection
        target = None
        for lname, rows in data.loops.items():
            title = Text(f"loop {lname}", style="bold")
            if data.hidden.get(lname):
                title.append(f"  (latest {len(rows)} revisions; {data.hidden[lname]} older ones "
                             f"in 'loopledger revision list {lname}')", style="dim")
            node = tree.root.add(title, data=(lname, None), expand=True)
            if want == (lname, None):
                target = node
            stack = [node]
            for row in rows:
                r = row.revision
                label = Text(f"{r.label} ")
                label.append_text(counts_text(row.counts))
                label.append(f" {r.author} {r.created_at:%Y-%m-%d %H:%M}  ", style="dim")
                label.append(_first_line(r.rationale))
                del stack[row.depth + 1:]
                child = stack[-1].add(label, data=(lname, r.label), expand=True)
                stack.append(child)
                self._rows[(lname, r.label)] = row
                if (lname, r.label) == want:
                    target = child
        if target is not None:
            tree.move_cursor(target)
        elif tree.root.children:
            tree.move_cursor(tree.root.children[0])
        self._detail(tree.cursor_node)

    def on_tree_node_highlighted(self, event: Tree.NodeHighlighted) -> None:
        self._detail(event.node)

    def _detail(self, node) -> None:
        box = self.query_one("#lineage-detail", Static)
        if node is None or node.data is None:
            box.update("No loops yet.")
            return
        lname, label = node.data
        if label is None:
            # a loop's header row selects that loop and its tip, never a revision of another loop
            tip = self._tips.get(lname)
            self.app.current_loop, self.app.current_label = lname, tip
            t = Text()
            t.append(f"loop {lname}\n", style="bold")
            t.append(f"selected: its tip {tip}\n" if tip else "no revision yet\n")
            t.append("a: add a revision of this loop (parent: its tip); pick a revision below "
                     "to branch from it or to plot and compare it.", style="dim")
            box.update(t)
            return
        self.app.current_loop, self.app.current_label = lname, label
        row = self._rows[(lname, label)]
        r = row.revision
        t = Text()
        t.append(f"{lname}/{r.label}\n", style="bold")
        t.append(f"by {r.author}, {r.created_at:%Y-%m-%d %H:%M} UTC\n")
        t.append(f"parent: {r.parent or 'none (root)'}\n")
        if r.children:
            t.append(f"children: {', '.join(r.children)}\n")
        t.append("verdicts: ")
        t.append_text(counts_text(row.counts))
        t.append("(pass, fail, error, stale)\n\n")
        t.append("controller\n", style="bold underline")
        t.append(f"{r.controller}\n")
        if r.discretization:
            t.append(f"discretised: {r.discretization}\n")
        if r.number_format:
            t.append(f"coefficients: {r.number_format}\n")
        if r.verified:
            t.append(f"verified as: {r.verified}\n")
        t.append("\n")
        if r.prefilter:
            t.append("prefilter (the revision's own)\n", style="bold underline")
            t.append(f"{r.prefilter}\n\n")
        if r.anti_windup != "none":
            gain = f", gain {r.anti_windup_gain:g} 1/s" if r.anti_windup_gain is not None else ""
            t.append(f"anti-windup: {r.anti_windup}{gain}\n\n")
        t.append("rationale\n", style="bold underline")
        t.append(r.rationale + "\n")
        box.update(t)
