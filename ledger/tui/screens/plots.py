"""Plot view: step response with the requirement bounds and loop-gain Bode plot with the
margins marked, for the selected revision on its nominal or worst plant variant (a model
member: a measurement has no step response); below them the Nyquist plot and the Nichols chart
of every family member (:mod:`ledger.tui.familydata`), the measured members also on the Bode
plot, one member highlighted: the worst variant of the selected requirement, else the member
with the smallest disk margin."""

from __future__ import annotations

import math

from rich.text import Text
from textual.containers import Horizontal, Vertical
from textual.widgets import Static
from textual_plotext import PlotextPlot

from .. import bindings
from ..widgets.verdict import fmt_value
from .base import ViewScreen

__all__ = ["PlotsScreen", "ROOM_FOR_BOTH"]

#: terminal rows from which the plot view shows the step/Bode row and the Nyquist/Nichols row
#: together (below it one row at a time, ``n`` switches)
ROOM_FOR_BOTH = 36


class PlotsScreen(ViewScreen):
    """Step and Bode plots computed in a worker."""

    BINDINGS = bindings.PLOTS

    def __init__(self, *a, **kw):
        super().__init__(*a, **kw)
        self.use_worst = False
        self.plot_data = None
        self.freq_unit = None  # "Hz" or "rad/s", read from the ledger's preferences on mount
        #: which rows show: "both", "time" (step and Bode) or "family" (Nyquist and Nichols);
        #: on mount "both" when the terminal has room for three rows of plots, else "time"
        self.layout_mode = None

    def on_mount(self) -> None:
        from ...prefs import frequency_unit

        self.freq_unit = frequency_unit(self.app.lg.url)
        self.layout_mode = "both" if self.app.size.height >= ROOM_FOR_BOTH else "time"
        self._apply_layout()

    def _apply_layout(self) -> None:
        self.query_one("#plots-time").display = self.layout_mode in ("both", "time")
        self.query_one("#plots-family").display = self.layout_mode in ("both", "family")

    def action_cycle_plots(self) -> None:
        """Both rows -> step and Bode only -> Nyquist and Nichols only -> both."""
        order = ("both", "time", "family")
        self.layout_mode = order[(order.index(self.layout_mode or "both") + 1) % 3]
        self._apply_layout()

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
        with Horizontal(id="plots-time"):
            yield PlotextPlot(id="plot-step")
            with Vertical():
                yield PlotextPlot(id="plot-mag")
                yield PlotextPlot(id="plot-phase")
        with Horizontal(id="plots-family"):
            yield PlotextPlot(id="plot-nyquist")
            yield PlotextPlot(id="plot-nichols")
        yield footer

    def fetch(self):
        import dataclasses

        from ...errors import LedgerError
        from ..familydata import load_family_plot
        from ..plotdata import load_plot_data, worst_variant

        lg = self.app.lg
        sel_loop, sel_label = self.app.selection
        loop = sel_loop or next((l.name for l in lg.loops()), None)
        if loop is None:
            return None
        # the selected revision of the selected loop; its tip when the selection names none
        rev = lg.revision(loop, sel_label if sel_loop == loop else None)
        results = lg.results(loop, rev.label)
        variant = (worst_variant(results, models_only=True) if self.use_worst
                   else "nominal")
        d = load_plot_data(lg, loop, rev.label, variant=variant)
        try:
            fam = load_family_plot(lg, loop, rev.label, requirement=self.app.current_req)
        except LedgerError as e:
            return dataclasses.replace(d, family_note=str(e))
        return dataclasses.replace(d, family=fam)

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
        t.append(f" ({'worst model variant' if self.use_worst else 'nominal'}; w toggles)   ")
        t.append(f"GM {fmt_value(d.gain_margin_db, 'dB')} at {self._ftext(d.phase_crossover)}"
                 f"   PM {fmt_value(d.phase_margin_deg, 'deg')} at "
                 f"{self._ftext(d.gain_crossover)}   (f: Hz / rad/s)")
        t.append("\nModel-based: not a substitute for hardware tests, safety standards and "
                 "qualified review.", style="italic dim")
        fam = d.family
        if fam is not None:
            def num(x):  # an engine value, or "none" when the member has none (never nan)
                return fmt_value(x, "") if math.isfinite(x) else "none"

            t.append(f"\nfamily: {len(fam.members)} of {fam.total} members; highlighted "
                     f"{fam.highlight} ({fam.reason}): Ms {num(fam.ms)}, disk "
                     f"margin {num(fam.alpha)}")
            n_meas = sum(1 for m in fam.members if m.measured)
            if n_meas:
                t.append(f"; {n_meas} measured (dots; x: left out, low coherence)")
        elif d.family_note:
            t.append(f"\nno Nyquist or Nichols view: {d.family_note}")
        cap.update(t)
        self._step(d)
        self._bode(d)
        self._nyquist(d)
        self._nichols(d)

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
        for m in (d.family.members if d.family is not None else ()):
            if not m.measured:
                continue
            col = "red" if m.name == d.family.highlight else "cyan"
            w, db_, deg = m.bode
            x = [math.log10(v * k) for v in w]
            mag.scatter(x, db_, marker="dot", color=col, label=m.name)
            ph.scatter(x, deg, marker="dot", color=col)
            wx, dbx, phx = m.bode_excluded
            if wx:
                xx = [math.log10(v * k) for v in wx]
                mag.scatter(xx, dbx, marker="x", color="magenta")
                ph.scatter(xx, phx, marker="x", color="magenta")
        for pid in ("#plot-mag", "#plot-phase"):
            self.query_one(pid, PlotextPlot).refresh()

    def _family_members(self, plt, fam, which: str) -> None:
        """Members on one family panel: others grey, nominal blue, measured cyan dots, the
        highlighted one red (drawn last, on top), left-out points magenta x."""
        order = sorted(fam.members, key=lambda m: (m.name == fam.highlight,
                                                   m.kind == "nominal" or m.measured))
        for m in order:
            x, y = getattr(m, which)
            if not x:
                continue
            hl = m.name == fam.highlight
            col = "red" if hl else "blue" if m.kind == "nominal" else \
                "cyan" if m.measured else "gray"
            lab = m.name if hl or m.kind == "nominal" or m.measured else None
            if m.measured:
                plt.scatter(x, y, marker="dot", color=col, label=lab)
            else:
                plt.plot(x, y, marker="braille", color=col, label=lab)
            xx, yy = getattr(m, which + "_excluded")
            if xx:
                plt.scatter(xx, yy, marker="x", color="magenta")

    def _nyquist(self, d) -> None:
        plot = self.query_one("#plot-nyquist", PlotextPlot)
        plt = plot.plt
        plt.clear_data()
        plt.clear_figure()
        fam = d.family
        plt.title("Nyquist L(jw): + critical point -1, Ms circle, disk-margin disk")
        if fam is not None:
            self._family_members(plt, fam, "nyquist")
            if fam.ms_circle:
                plt.plot(*fam.ms_circle, marker="dot", color="green",
                         label=f"1/Ms {1 / fam.ms:.3g}")
            if fam.disk:
                plt.plot(*fam.disk, marker="dot", color="orange", label="disk margin")
            for re, im, _, _, text in fam.marks.get(self.freq_unit or "Hz", ()):
                plt.text(text, re, im, color="yellow", background="default")
        plt.scatter([-1.0], [0.0], marker="+", color="white")
        plt.xlim(-3.0, 1.5)
        plt.ylim(-2.0, 1.0)
        plt.xlabel("Re L")
        plot.refresh()

    def _nichols(self, d) -> None:
        plot = self.query_one("#plot-nichols", PlotextPlot)
        plt = plot.plt
        plt.clear_data()
        plt.clear_figure()
        fam = d.family
        plt.title("Nichols: |L| (dB) vs arg L (deg), |T| contours (dB)")
        if fam is not None:
            for m_db, x, y in fam.contours:
                if m_db in (6.0, 3.0, 0.0, -3.0):
                    plt.plot(x, y, marker="dot", color="gray+")
            self._family_members(plt, fam, "nichols")
            for _, _, phase, db, text in fam.marks.get(self.freq_unit or "Hz", ()):
                if -360 <= phase <= 0 and abs(db) <= 40:
                    plt.text(text, phase, db, color="yellow", background="default")
        plt.scatter([-180.0], [0.0], marker="+", color="white")
        plt.xlim(-360.0, 0.0)
        plt.ylim(-40.0, 40.0)
        plt.xlabel("arg L [deg]  contours |T| = 6, 3, 0, -3 dB")
        plot.refresh()
