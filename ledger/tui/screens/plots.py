"""Plot view: step response with the requirement bounds and loop-gain Bode plot with the
margins marked, for the selected revision on its nominal or worst plant variant."""

from __future__ import annotations

import math

from rich.text import Text
from textual.containers import Horizontal, Vertical
from textual.widgets import Static
from textual_plotext import PlotextPlot

from .. import bindings
from ..widgets.verdict import fmt_value
from .base import ViewScreen

__all__ = ["PlotsScreen"]


class PlotsScreen(ViewScreen):
    """Step and Bode plots computed in a worker."""

    BINDINGS = bindings.PLOTS

    def __init__(self, *a, **kw):
        super().__init__(*a, **kw)
        self.use_worst = False
        self.plot_data = None

    def compose(self):
        header, footer = self.header_footer()
        yield header
        yield Static("computing...", id="plots-caption")
        with Horizontal():
            yield PlotextPlot(id="plot-step")
            with Vertical():
                yield PlotextPlot(id="plot-mag")
                yield PlotextPlot(id="plot-phase")
        yield footer

    def fetch(self):
        from ..plotdata import load_plot_data, worst_variant

        lg = self.app.lg
        sel_loop, sel_label = self.app.selection
        loop = sel_loop or next((l.name for l in lg.loops()), None)
        if loop is None:
            return None
        # the selected revision of the selected loop; its tip when the selection names none
        rev = lg.revision(loop, sel_label if sel_loop == loop else None)
        variant = worst_variant(lg.results(loop, rev.label)) if self.use_worst else "nominal"
        return load_plot_data(lg, loop, rev.label, variant=variant)

    def reload(self) -> None:
        self.query_one("#plots-caption", Static).update("computing...")
        super().reload()

    def action_toggle_variant(self) -> None:
        self.use_worst = not self.use_worst
        self.reload()

    def present(self, d) -> None:
        self.plot_data = d
        cap = self.query_one("#plots-caption", Static)
        if d is None:
            cap.update("No loops yet.")
            return
        t = Text()
        t.append(f"{d.loop}/{d.label} on variant {d.variant}", style="bold")
        t.append(f" ({'worst' if self.use_worst else 'nominal'}; w toggles)   ")
        t.append(f"GM {fmt_value(d.gain_margin_db, 'dB')} at {fmt_value(d.phase_crossover, 'rad/s')}"
                 f"   PM {fmt_value(d.phase_margin_deg, 'deg')} at "
                 f"{fmt_value(d.gain_crossover, 'rad/s')}")
        t.append("\nModel-based: not a substitute for hardware tests, safety standards and "
                 "qualified review.", style="italic dim")
        cap.update(t)
        self._step(d)
        self._bode(d)

    def _step(self, d) -> None:
        plot = self.query_one("#plot-step", PlotextPlot)
        plt = plot.plt
        plt.clear_data()
        plt.clear_figure()
        plt.title("step response r->y")
        plt.plot(d.t.tolist(), d.y.tolist(), label=d.variant, marker="braille")
        plt.hline(d.final, "blue")
        for b in d.bounds:
            if b.kind == "overshoot":
                plt.hline(b.value, "red")
            elif b.kind in ("settling", "rise"):
                plt.vline(b.value, "red" if b.kind == "settling" else "orange")
        if any(b.kind == "settling" for b in d.bounds):
            plt.hline(d.final * (1 + d.settle_band), "gray")
            plt.hline(d.final * (1 - d.settle_band), "gray")
        plt.xlabel("t [s]  red: limits of " + ", ".join(b.key for b in d.bounds) if d.bounds
                   else "t [s]")
        plot.refresh()

    def _bode(self, d) -> None:
        mag = self.query_one("#plot-mag", PlotextPlot).plt
        ph = self.query_one("#plot-phase", PlotextPlot).plt
        lw = [math.log10(w) for w in d.w.tolist()]
        for plt, ys, title in ((mag, d.mag_db.tolist(), "|L| dB vs log10 w [rad/s]"),
                               (ph, d.phase_deg.tolist(), "arg L deg vs log10 w [rad/s]")):
            plt.clear_data()
            plt.clear_figure()
            plt.title(title)
            plt.plot(lw, ys, marker="braille")
        mag.hline(0.0, "gray")
        if math.isfinite(d.gain_crossover) and d.gain_crossover > 0:
            mag.vline(math.log10(d.gain_crossover), "red")
            ph.vline(math.log10(d.gain_crossover), "red")
        if math.isfinite(d.phase_crossover) and d.phase_crossover > 0:
            mag.vline(math.log10(d.phase_crossover), "orange")
            ph.vline(math.log10(d.phase_crossover), "orange")
        ph.hline(-180.0, "gray")
        for pid in ("#plot-mag", "#plot-phase"):
            self.query_one(pid, PlotextPlot).refresh()
