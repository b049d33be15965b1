"""Requirement detail: statement, rationale, limit, versions, trace links with verdicts, the
metric's value across the loop's revisions (a small trend plot) and what drives its worst
value on each loop's tip (computed in a worker after the rest is shown)."""

from __future__ import annotations

import math

from rich.text import Text
from textual import work
from textual.containers import Horizontal, VerticalScroll
from textual.widgets import Static
from textual_plotext import PlotextPlot

from .. import bindings
from ...errors import LedgerError
from ..data import load_drivers, load_requirement
from ...waivers import today
from ..widgets.verdict import SYMBOL, STYLE, fmt_value, verdict_text, waiver_text
from .base import ViewScreen

__all__ = ["RequirementScreen"]


class RequirementScreen(ViewScreen):
    """One requirement in full."""

    BINDINGS = bindings.REQUIREMENT

    def __init__(self, *a, **kw):
        super().__init__(*a, **kw)
        self._data = None
        #: what drives the worst value, by (key, tips' results): computed once per state
        self._drivers: dict = {}

    def compose(self):
        header, footer = self.header_footer()
        yield header
        with Horizontal():
            with VerticalScroll(id="req-side"):
                yield Static("", id="req-detail")
                yield Static("", id="req-drivers")
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

    def action_waive(self) -> None:
        """Open the waiver form for this requirement on the selected revision (or the tip
        of the first loop it applies to)."""
        if self._data is None or not self._data.requirement.metric:
            self.notify("this requirement has no metric, so no verdict to waive",
                        severity="warning")
            return
        r = self._data.requirement
        loop, label = self.app.selection
        if loop not in r.loops:
            loop = r.loops[0] if r.loops else None
            label = None
        if loop is None:
            self.notify(f"{r.key} applies to no loop", severity="warning")
            return
        if label is None:
            label = self.app.lg.loop(loop).tip
        if label is None:
            self.notify(f"loop {loop} has no revision yet", severity="warning")
            return
        res = next((x for lname, rev, x in self._data.trend
                    if lname == loop and rev.label == label), None)
        from .waiver_form import WaiverForm

        def done(number) -> None:
            if number is not None:
                self.notify(f"waiver {number} recorded for {r.key} on {loop}/{label}")
                self.reload()

        self.app.push_screen(WaiverForm(r.key, loop, label,
                                        verdict=res.verdict if res else "unverified"), done)

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

                # on a line of its own under the value (the pane is narrow)
                t.append(f"\n      {res.pass_fraction:.0%} pass, yield bound {bound_text(res)}",
                         style="dim")
            t.append("\n")
        t.append("\nwaivers (w: waive a failure on the selected revision)\n",
                 style="bold underline")
        day = today()
        if not data.waivers:
            t.append("  -\n")
        for w in data.waivers:
            st = w.status(day)
            t.append(f"  {w.scope:<12} ")
            t.append(f"{st:<9}", style=STYLE["waived"] if st == "live" else "dim")
            t.append(f" {waiver_text(w)}\n")
        t.append("\nversions\n", style="bold underline")
        for h in data.history:
            t.append(f"  v{h.version} {h.created_at:%Y-%m-%d} {h.author}: {h.metric or '-'} "
                     f"{h.limit_text} [{h.status}]{' - ' + h.note if h.note else ''}\n")
        box.update(t)
        self._plot(data)
        self._show_drivers(data)

    def _drivers_key(self, data) -> tuple:
        tips = {}
        for lname, rev, res in data.trend:  # the last revision of each loop is its tip
            tips[lname] = (rev.label, res)
        return (data.requirement.key, data.requirement.version, tuple(sorted(
            (k, v[0], v[1].created_at if v[1] else None) for k, v in tips.items())))

    def _show_drivers(self, data) -> None:
        box = self.query_one("#req-drivers", Static)
        if not data.requirement.metric or not data.requirement.loops:
            box.update("")
            return
        key = self._drivers_key(data)
        if key in self._drivers:
            box.update(self._drivers[key])
            return
        box.update(Text("what drives the worst value: computing...", style="dim"))
        self._compute_drivers(key)

    @work(thread=True, exclusive=True, group="drivers")
    def _compute_drivers(self, key) -> None:
        try:
            found = load_drivers(self.app.lg, key[0])
        except LedgerError as e:  # e.g. the requirement was retired meanwhile: said in the view
            found = e
        self.app.call_from_thread(self._drivers_ready, key, found)

    def _drivers_ready(self, key, found) -> None:
        text = drivers_text(found)
        self._drivers[key] = text
        if self._data is not None and self._drivers_key(self._data) == key:
            self.query_one("#req-drivers", Static).update(text)

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


def drivers_text(found) -> Text:
    """The "what drives the worst value" section of ``load_drivers``'s result."""
    from ...driversview import corner_line, effect_rows, headline, summary

    t = Text()
    t.append("what drives the worst value\n", style="bold underline")
    if isinstance(found, Exception):
        t.append(f"  cannot tell: {found}\n", style="red")
        return t
    if not found:
        t.append("  no loop with a revision yet\n")
    for lname, d in found:
        if isinstance(d, Exception):
            t.append(f"  {lname}: {d}\n", style="red")
            continue
        t.append(f"  {headline(d)}\n")
        if not d.effects:
            t.append(f"    {d.note}\n", style="dim")
            continue
        line = corner_line(d)
        if line:
            t.append(f"    {line}\n")
        t.append(f"    {summary(d)}\n", style="bold")
        for rank, name, band, at, change, err, worse, ends, note in effect_rows(d):
            t.append(f"    {rank:>2} {name:<10} {change}")
            if err != "-":
                t.append(f" {err}", style="dim")
            t.append(f"  worse when {worse}  at worst: {at}  band {band}\n"
                     if worse != "-" else f"  at worst: {at}  band {band}\n")
            if ends != "-":
                t.append(f"       low end -> high end: {ends}\n", style="dim")
            if note:
                t.append(f"       {note}\n", style="dim")
        if d.note:
            t.append(f"    note: {d.note}\n", style="dim")
    steps = {d.step for _, d in found if not isinstance(d, Exception)}
    if steps:
        t.append(f"  slopes: central differences, step {100 * max(steps):g} % of each "
                 "tolerance width (docs/history.md)\n", style="dim")
    t.append("  model-based verification does not replace hardware testing, applicable safety "
             "standards and qualified review\n", style="dim")
    return t
