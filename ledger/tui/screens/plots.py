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
        self.freq_unit = None  # "Hz" or "rad/s", read from the ledger's preferences on mount

    def on_mount(self) -> None:
        from ...prefs import frequency_unit

        self.freq_unit = frequency_unit(self.app.lg.url)

    def _fk(self) -> float:
        """Factor from rad/s to the frequency unit shown."""
        return 1.0 / (2.0 * math.pi) if self.freq_unit == "Hz" else 1.0

    def _ftext(self, w: float) -> str:
        if w is None or not math.isfinite(w):
            return fmt_value(w, self.freq_unit or "Hz")
        return f"{w * self._fk():.4g} {self.freq_unit}"

    def action_toggle_frequency_unit(self) -> None:
        from ...prefs import set_frequency_unit

        self.freq_unit = "rad/s" if self.freq_unit == "Hz" else "Hz"
        if not set_frequency_unit(self.app.lg.url, self.freq_unit):
            self.notify("frequency unit not saved (preferences file not writable)",
                        severity="warning")
        if self.plot_data is not None:
            self.present(self.plot_data)

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
        t.append(f"GM {fmt_value(d.gain_margin_db, 'dB')} at {self._ftext(d.phase_crossover)}"
                 f"   PM {fmt_value(d.phase_margin_deg, 'deg')} at "
                 f"{self._ftext(d.gain_crossover)}   (f: Hz / rad/s)")
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
        if d.move is not None:
            self._move(plt, d)
            plot.refresh()
            return
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

    def _move(self, plt, d) -> None:
        """The large move beside the linear step of the same amplitude; yellow lines bound
        the intervals the actuator is at its limit."""
        mv = d.move
        plt.title(f"large move r->y, amplitude {mv.amplitude:g} ({mv.key})")
        plt.plot(mv.t.tolist(), mv.y.tolist(), label="large move", marker="braille")
        plt.plot(mv.t.tolist(), mv.linear.tolist(), label="linear step", marker="dot")
        for a, b in mv.saturated:
            plt.vline(a, "yellow")
            plt.vline(b, "yellow")
        for b in d.bounds:
            if b.kind == "settling":
                plt.vline(b.value, "red")
        plt.xlabel("t [s]  yellow: actuator at its limit" if mv.saturated else
                   "t [s]  (the actuator never reaches its limit)")

    def _bode(self, d) -> None:
        from ..plotdata import log_ticks

        mag = self.query_one("#plot-mag", PlotextPlot).plt
        ph = self.query_one("#plot-phase", PlotextPlot).plt
        k, unit = self._fk(), self.freq_unit or "Hz"
        f = [w * k for w in d.w.tolist()]
        lw = [math.log10(x) for x in f]
        pos, labels = log_ticks(min(f), max(f))
        for plt, ys, title in ((mag, d.mag_db.tolist(), f"|L| (dB) vs frequency ({unit})"),
                               (ph, d.phase_deg.tolist(), f"arg L (deg) vs frequency ({unit})")):
            plt.clear_data()
            plt.clear_figure()
            plt.title(title)
            plt.plot(lw, ys, marker="braille")
            plt.xticks(pos, labels)  # real frequencies on the log axis
        mag.hline(0.0, "gray")
        if math.isfinite(d.gain_crossover) and d.gain_crossover > 0:
            mag.vline(math.log10(d.gain_crossover * k), "red")
            ph.vline(math.log10(d.gain_crossover * k), "red")
        if math.isfinite(d.phase_crossover) and d.phase_crossover > 0:
            mag.vline(math.log10(d.phase_crossover * k), "orange")
            ph.vline(math.log10(d.phase_crossover * k), "orange")
        ph.hline(-180.0, "gray")
        for pid in ("#plot-mag", "#plot-phase"):
            self.query_one(pid, PlotextPlot).refresh()
