"""Requirement detail: statement, rationale, limit, versions, trace links with verdicts and
the metric's value across the loop's revisions (a small trend plot)."""

from __future__ import annotations

import math

from rich.text import Text
from textual.containers import Horizontal, VerticalScroll
from textual.widgets import Static
from textual_plotext import PlotextPlot

from .. import bindings
from ..data import load_requirement
from ..widgets.verdict import SYMBOL, STYLE, fmt_value, verdict_text
from .base import ViewScreen

__all__ = ["RequirementScreen"]


class RequirementScreen(ViewScreen):
    """One requirement in full."""

    BINDINGS = bindings.REQUIREMENT

    def __init__(self, *a, **kw):
        super().__init__(*a, **kw)
        self._data = None

    def compose(self):
        header, footer = self.header_footer()
        yield header
        with Horizontal():
            with VerticalScroll(id="req-side"):
                yield Static("", id="req-detail")
            yield PlotextPlot(id="req-trend")
        yield footer

    def fetch(self):
        return load_requirement(self.app.lg, self.app.current_req)

    def action_step(self, step: int) -> None:
        if self._data is None:
            return
        keys = self._data.keys
        i = keys.index(self._data.requirement.key)
        self.app.current_req = keys[(i + step) % len(keys)]
        self.reload()

    def present(self, data) -> None:
        self._data = data
        box = self.query_one("#req-detail", Static)
        if data is None:
            box.update("No requirements yet.")
            return
        r = data.requirement
        self.app.current_req = r.key
        t = Text()
        t.append(f"{r.key}  {r.title}\n", style="bold")
        t.append(f"version {r.version} of {r.latest_version}, {r.status}, by {r.method}\n")
        t.append(f"check: {r.metric or '(none: verified through derived requirements)'} "
                 f"{r.limit_text}\n", style="bold" if r.metric else "")
        if r.yield_target is not None:
            from ...yieldbound import samples_needed, yield_text

            t.append(f"yield target: >= {yield_text(r.yield_target, r.confidence)}, judged on "
                     f"the lower confidence bound ({samples_needed(r.yield_target, r.confidence)}"
                     " passing samples with none failing support it)\n")
        elif r.confidence is not None:
            from ...yieldbound import percent_text

            t.append(f"yield bound at {percent_text(r.confidence)} confidence\n")
        t.append(f"loops: {', '.join(r.loops) or '-'}\n\n")
        t.append("statement\n", style="bold underline")
        t.append(f"{r.statement}\n\n")
        if r.rationale:
            t.append("rationale\n", style="bold underline")
            t.append(f"{r.rationale}\n\n")
        for title, links in (("derives from", data.parents), ("derived by", data.children)):
            t.append(f"{title}\n", style="bold underline")
            if not links:
                t.append("  -\n")
            for link in links:
                t.append(f"  {link.key} {link.title}: ")
                if not link.verdicts:
                    t.append("no metric of its own", style="dim")
                for lname, tip, res in link.verdicts:
                    t.append_text(verdict_text(res.verdict if res else "unverified"))
                    t.append(f" on {lname}/{tip}  ")
                t.append("\n")
            t.append("\n")
        t.append("values across revisions\n", style="bold underline")
        for lname, rev, res in data.trend:
            v = res.verdict if res else "unverified"
            t.append(f"  {lname}/{rev.label:<6} ")
            t.append(f"{SYMBOL.get(v, '?')} {v:<10}", style=STYLE.get(v, ""))
            t.append(f" {fmt_value(res.value, res.unit, res.limit_text) if res else '-'}")
            if res is not None and res.samples is not None and res.pass_fraction is not None:
                # a family with random samples: the pass fraction and its lower bound
                from ...yieldbound import bound_text

                t.append(f"  {res.pass_fraction:.0%} pass, yield bound {bound_text(res)}")
            t.append("\n")
        t.append("\nversions\n", style="bold underline")
        for h in data.history:
            t.append(f"  v{h.version} {h.created_at:%Y-%m-%d} {h.author}: {h.metric or '-'} "
                     f"{h.limit_text} [{h.status}]{' - ' + h.note if h.note else ''}\n")
        box.update(t)
        self._plot(data)

    def _plot(self, data) -> None:
        plot = self.query_one(PlotextPlot)
        plt = plot.plt
        plt.clear_data()
        plt.clear_figure()
        from ...display import shown_unit, to_shown
        from ...prefs import frequency_unit

        r = data.requirement
        unit = next((res.unit for _, _, res in data.trend if res is not None), r.unit or "")
        if unit == "rad/s":  # a frequency: in the unit chosen for this ledger's plots
            fu = frequency_unit(self.app.lg.url)
            k = 1 / (2 * math.pi) if fu == "Hz" else 1.0

            def conv(x):
                return x * k
            shown = fu
        else:  # in the limit's unit, as everywhere else
            def conv(x):
                return to_shown(x, unit, r.limit_text)
            shown = shown_unit(unit, r.limit_text)
        xs, ys, labels = [], [], []
        for i, (lname, rev, res) in enumerate(data.trend):
            if res is not None and res.value is not None and math.isfinite(res.value):
                y = conv(res.value)
                if y is not None and math.isfinite(y):
                    xs.append(i + 1)
                    ys.append(y)
            labels.append(rev.label)
        plt.title(f"{r.key}: {r.metric or '-'} per revision")
        if xs:
            plt.plot(xs, ys, marker="dot", label="worst value")
            if r.limit_value is not None and math.isfinite(r.limit_value):
                lim = conv(r.limit_value)
                if lim is not None and math.isfinite(lim):
                    plt.hline(lim, "red")
            plt.xticks(list(range(1, len(labels) + 1)), labels)
            plt.ylabel(shown if shown not in ("ratio", "") else "")
        plot.refresh()
