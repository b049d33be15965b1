"""Evidence figures of matrix entries, drawn with matplotlib (Agg, no pyplot state) as SVG.

One figure per entry, chosen by the metric's signal path:

* ``r->y`` step metrics: the step response with the limit drawn on it (overshoot line,
  settling band and settling-time limit, rise-time levels and markers, peak-time limit);
* ``r->e`` step error, ``r->u`` effort, ``d->y`` disturbance: that path's step response with
  the limit band;
* large-move metrics: the simulated move beside the linear step of the same amplitude, the
  actuator's saturation intervals shaded (:mod:`ledger.exports.moveplots`);
* loop-gain metrics (margins, crossovers, error constants): Bode plot of L with the gain and
  phase crossovers and margins marked and the limit drawn;
* ``S``/``T``/``CS`` and disk-margin metrics: the magnitudes with their bounds;
* pole metrics: the closed-loop pole map with the damping or decay-rate bound;
* ``model_fit``/``model_fit_phase``: the plant's Bode plot, design model against the measured
  members (:mod:`ledger.exports.loopplots`).

Measured members are added to the loop-gain Bode plot at their measured points (the points
left out for low coherence as hollow markers) when the family views are given; the Nyquist
and Nichols views of the whole family are :func:`ledger.exports.loopplots.family_figure`.

Every plot has axis labels with units and a legend, and shows the nominal variant and the
worst variant the ledger named.  The ledger's value is shown beside the curves; nothing is
judged here.
"""

from __future__ import annotations

import io
import math
import re

import numpy as np

from ..text import printable
from .figstyle import _aligned_phase, _finish  # noqa: F401 - shared with rmsplot
from .rows import require

__all__ = ["entry_figure", "entry_plot", "figure_kind", "PALETTE"]

#: Colours: nominal, worst variant, limit, ledger value marker, band fill.
PALETTE = {"nominal": "#1f5fa8", "worst": "#c2410c", "limit": "#7a1f1f", "value": "#2f6f3e",
           "band": "#f1d9a6", "extra": "#6b7280"}

_STEP_PATH = {"rise_time", "settling_time", "overshoot", "undershoot", "peak_time"}
_POLE = {"stable", "min_damping", "decay_rate"}
_DISK = {"disk_margin", "disk_gain_margin", "disk_phase_margin"}
_SENS = {"peak_sensitivity", "peak_complementary_sensitivity", "peak_control_sensitivity",
         "sensitivity_below", "complementary_sensitivity_above", "bandwidth"}


def figure_kind(metric: str) -> str:
    """``step``, ``effort``, ``error``, ``disturbance``, ``move``, ``bode``, ``sensitivity``,
    ``disk``, ``poles`` or ``fit``."""
    if metric in ("model_fit", "model_fit_phase"):
        return "fit"
    if metric in _STEP_PATH:
        return "step"
    if metric == "peak_effort":
        return "effort"
    if metric == "steady_state_error":
        return "error"
    if metric in ("disturbance_peak", "disturbance_recovery", "disturbance_offset"):
        return "disturbance"
    if metric.startswith("move_"):
        return "move"
    if metric in _SENS:
        return "sensitivity"
    if metric in _DISK:
        return "disk"
    if metric in _POLE:
        return "poles"
    return "bode"


def _num(x, digits=4) -> str:
    if x is None:
        return "none"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return f"{x:.{digits}g}"


def _thin(x: np.ndarray, y: np.ndarray, max_points: int = 1500):
    """Fewer points for drawing: a uniform stride plus each stride's extremes, so peaks stay."""
    n = x.size
    if n <= max_points:
        return x, y
    step = int(math.ceil(n / (max_points / 3)))
    keep = [np.arange(0, n, step), [n - 1]]
    yy = np.abs(y) if np.iscomplexobj(y) else y
    m = (n // step) * step
    if m:
        blocks = yy[:m].reshape(-1, step)
        base = np.arange(0, m, step)
        keep += [base + np.argmax(blocks, axis=1), base + np.argmin(blocks, axis=1)]
    idx = np.unique(np.concatenate(keep))
    return x[idx], y[idx]



def _svg(fig) -> str:
    import matplotlib

    buf = io.StringIO()
    with matplotlib.rc_context({"svg.fonttype": "none", "svg.hashsalt": "loopledger"}):
        fig.savefig(buf, format="svg")
    text = printable(buf.getvalue())  # figure titles carry stored text (ledger/text.py)
    text = re.sub(r"^<\?xml[^>]*>\s*", "", text)
    text = re.sub(r"<!DOCTYPE[^>]*>\s*", "", text)
    text = re.sub(r"<metadata>.*?</metadata>\s*", "", text, flags=re.S)
    return text.strip()


def _labels(curves, worst: str):
    """(name, label, colour) of the variants to draw, nominal first."""
    out = []
    for n in curves.variants:
        if n == curves.variants[0]:
            lab = "nominal" + (" (also the worst)" if worst == n else "")
            out.append((n, lab, PALETTE["nominal"]))
        elif n == worst:
            out.append((n, f"worst variant: {n}", PALETTE["worst"]))
    return out


def _step_like(ax, curves, path, amp, worst, ylabel):
    sc = curves.step(path, amp)
    ds = "steps-post" if curves.assembly.dt else "default"
    for n, lab, col in _labels(curves, worst):
        ax.plot(*_thin(sc.t[n], sc.y[n]), color=col, lw=1.6, label=lab, drawstyle=ds)
    ax.set_xlabel("time t (s)")
    ax.set_ylabel(ylabel)
    ax.grid(True, alpha=0.3)
    ends = [_quiet_after(sc.t[n], sc.y[n], sc.final[n]) for n in sc.t]
    ax.set_xlim(0.0, 1.4 * max(ends))
    return sc


def _quiet_after(t, y, yf, frac: float = 0.002) -> float:
    """Time after which y stays within frac of its scale around yf (for the plot's x range)."""
    scale = max(abs(yf), float(np.max(np.abs(y))) if y.size else 0.0) or 1.0
    out = np.flatnonzero(np.abs(y - yf) > frac * scale)
    if out.size == 0 or not math.isfinite(yf):
        return float(t[-1]) if t.size else 1.0
    return float(t[min(out[-1] + 1, t.size - 1)]) or float(t[-1])


def _include_x(ax, times) -> None:
    lo, hi = ax.get_xlim()
    more = [t for t in times if t is not None and math.isfinite(t) and t > 0]
    if more and max(more) * 1.15 > hi:
        ax.set_xlim(lo, max(more) * 1.15)


def _first_cross(t, y, level, sign):
    idx = np.flatnonzero(sign * y >= sign * level)
    if idx.size == 0:
        return None
    i = int(idx[0])
    if i == 0:
        return float(t[0])
    y0, y1 = y[i - 1], y[i]
    return float(t[i - 1] + (level - y0) / (y1 - y0) * (t[i] - t[i - 1])) if y1 != y0 else float(t[i])


def _draw_step(fig, curves, req, res, worst):
    ax = fig.add_subplot(111)
    st = req.settings or {}
    amp = float(st.get("amplitude", 1.0))
    unit = f" ({curves.output_unit})" if curves.output_unit else ""
    sc = _step_like(ax, curves, "r->y", amp, worst, f"output y{unit}")
    w = worst if worst in sc.final else curves.variants[0]
    yf = sc.final[w]
    lim, m, val = req.limit_value, req.metric, res.value if res else None
    ax.axhline(yf, color=PALETTE["extra"], ls=":", lw=1, label=f"final value {_num(yf)}")
    if m == "overshoot":
        ax.axhline(yf * (1 + lim / 100.0), color=PALETTE["limit"], ls="--", lw=1.3,
                   label=f"overshoot limit {req.limit_text}")
    elif m == "undershoot":
        ax.axhline(-yf * lim / 100.0, color=PALETTE["limit"], ls="--", lw=1.3,
                   label=f"undershoot limit {req.limit_text}")
    elif m == "settling_time":
        band = float(st.get("settling_band", 0.02))
        basis = abs(amp) if st.get("settling_basis", "final") == "step" else abs(yf)
        ax.axhspan(yf - band * basis, yf + band * basis, color=PALETTE["band"], alpha=0.6,
                   label=f"settling band +-{_num(100 * band)} %")
        ax.axvline(lim, color=PALETTE["limit"], ls="--", lw=1.3,
                   label=f"settling-time limit {req.limit_text}")
        if val is not None and math.isfinite(val):
            ax.axvline(val, color=PALETTE["value"], ls="-.", lw=1.2,
                       label=f"settling time (ledger, worst) {_num(val)} s")
    elif m == "rise_time":
        lo, hi = st.get("rise_limits", (0.1, 0.9))
        for frac in (lo, hi):
            ax.axhline(frac * yf, color=PALETTE["extra"], ls="--", lw=0.8)
        t_lo = _first_cross(sc.t[w], sc.y[w], lo * yf, 1.0 if yf >= 0 else -1.0)
        if t_lo is not None:
            ax.axvline(t_lo, color=PALETTE["extra"], ls=":", lw=1,
                       label=f"{_num(100 * lo)} % reached (worst)")
            ax.axvline(t_lo + lim, color=PALETTE["limit"], ls="--", lw=1.3,
                       label=f"rise-time limit {req.limit_text} after that")
            if val is not None and math.isfinite(val):
                ax.axvline(t_lo + val, color=PALETTE["value"], ls="-.", lw=1.2,
                           label=f"{_num(100 * hi)} % reached: rise time (ledger) {_num(val)} s")
    elif m == "peak_time":
        ax.axvline(lim, color=PALETTE["limit"], ls="--", lw=1.3,
                   label=f"peak-time limit {req.limit_text}")
        if val is not None and math.isfinite(val):
            ax.axvline(val, color=PALETTE["value"], ls="-.", lw=1.2,
                       label=f"peak time (ledger) {_num(val)} s")
    _include_x(ax, [lim if m in ("settling_time", "peak_time") else None,
                    val if m in ("settling_time", "peak_time", "rise_time") else None])
    ax.set_title(f"Step response r -> y, amplitude {_num(amp)}")


def _draw_band_path(fig, curves, req, res, worst, path, ylabel, title):
    ax = fig.add_subplot(111)
    amp = float((req.settings or {}).get("amplitude", 1.0))
    sc = _step_like(ax, curves, path, amp, worst, ylabel)
    lim = req.limit_value
    if req.metric == "disturbance_recovery":
        ax.axvline(lim, color=PALETTE["limit"], ls="--", lw=1.3,
                   label=f"recovery-time limit {req.limit_text}")
        if res and res.value is not None and math.isfinite(res.value):
            ax.axvline(res.value, color=PALETTE["value"], ls="-.", lw=1.2,
                       label=f"recovery time (ledger) {_num(res.value)} s")
    else:
        ax.axhline(lim, color=PALETTE["limit"], ls="--", lw=1.3,
                   label=f"limit {req.limit_text} (+-)")
        ax.axhline(-lim, color=PALETTE["limit"], ls="--", lw=1.3)
    if req.metric == "disturbance_recovery":
        _include_x(ax, [lim, res.value if res else None])
    ax.set_title(f"{title}, step amplitude {_num(amp)}")
    return sc


def _freq_range(ax, fc, names) -> None:
    """Show two decades either side of the crossovers (the whole grid when there are none)."""
    marks = [x for n in names for x in (fc.gain_crossover[n], fc.phase_crossover[n])
             if math.isfinite(x) and x > 0]
    if marks:
        w_all = np.concatenate([fc.w[n] for n in names])
        ax.set_xlim(max(min(marks) / 100.0, float(w_all.min())),
                    min(max(marks) * 100.0, float(w_all.max())))


def _fit_log_y(ax, floor_ratio: float = 1e-3) -> None:
    """Log y range fitted to what is visible, at most ``1/floor_ratio`` below the top."""
    lo_x, hi_x = ax.get_xlim()
    tops, bots = [], []
    for line in ax.get_lines():
        x, y = np.asarray(line.get_xdata(), float), np.asarray(line.get_ydata(), float)
        sel = (x >= lo_x) & (x <= hi_x) & np.isfinite(y) & (y > 0)
        if sel.sum() > 1:
            tops.append(y[sel].max())
            bots.append(y[sel].min())
    if tops:
        top = max(tops) * 2.0
        ax.set_ylim(max(min(bots) * 0.5, top * floor_ratio), top)



def _draw_bode(fig, curves, req, res, worst):
    fc = curves.freq()
    axm, axp = fig.add_subplot(211), fig.add_subplot(212, sharex=None)
    for n, lab, col in _labels(curves, worst):
        w, L = fc.w[n], fc.L[n]
        mag = 20 * np.log10(np.maximum(np.abs(L), 1e-300))
        ph = _aligned_phase(L, w, fc.gain_crossover[n], fc.phase_margin[n])
        axm.semilogx(*_thin(w, mag), color=col, lw=1.5, label=lab)
        axp.semilogx(*_thin(w, ph), color=col, lw=1.5, label=lab)
        wgc, pm = fc.gain_crossover[n], fc.phase_margin[n]
        if math.isfinite(wgc):
            axm.plot([wgc], [0.0], "o", color=col, ms=5)
            axp.plot([wgc, wgc], [-180.0, pm - 180.0], color=col, lw=2.5, alpha=0.7,
                     label=f"PM {_num(pm)} deg at {_num(wgc)} rad/s ({lab.split(':')[0]})")
        wpc, gm = fc.phase_crossover[n], fc.gain_margin[n]
        if math.isfinite(wpc) and math.isfinite(gm):
            axp.plot([wpc], [-180.0 + 360.0 * round((float(np.interp(wpc, w, ph)) + 180.0) / 360.0)],
                     "s", color=col, ms=5)
            axm.plot([wpc, wpc], [-gm, 0.0], color=col, lw=2.5, alpha=0.7,
                     label=f"GM {_num(gm)} dB at {_num(wpc)} rad/s ({lab.split(':')[0]})")
    axm.axhline(0.0, color=PALETTE["extra"], lw=0.8)
    axp.axhline(-180.0, color=PALETTE["extra"], lw=0.8)
    lim, m = req.limit_value, req.metric
    if m == "phase_margin":
        axp.axhline(lim - 180.0, color=PALETTE["limit"], ls="--", lw=1.3,
                    label=f"phase at crossover for PM limit {req.limit_text}")
    elif m in ("gain_margin", "gain_margin_lower"):
        axm.axhline(-lim, color=PALETTE["limit"], ls="--", lw=1.3,
                    label=f"|L| at phase crossover for GM limit {req.limit_text}")
    elif m in ("gain_crossover", "phase_crossover"):
        for ax in (axm, axp):
            ax.axvline(lim, color=PALETTE["limit"], ls="--", lw=1.3,
                       label=f"limit {req.limit_text}" if ax is axm else None)
    for ax in (axm, axp):
        _freq_range(ax, fc, curves.variants)
    axm.set_ylabel("|L| (dB)")
    axp.set_ylabel("phase of L (deg)")
    for ax in (axm, axp):
        ax.set_xlabel("frequency w (rad/s)")
    axm.set_title("Loop gain L (Bode): crossovers and margins marked")
    for ax in (axm, axp):
        ax.grid(True, which="both", alpha=0.3)


def _sens_show(m: str) -> tuple:
    """The closed-loop magnitudes the figure of metric ``m`` shows."""
    if m in ("peak_sensitivity", "peak_complementary_sensitivity"):
        return ("S", "T")
    return {"sensitivity_below": ("S",), "peak_control_sensitivity": ("CS",),
            "bandwidth": ("T",)}.get(m, ("S", "T"))


def _draw_sens(fig, curves, req, res, worst):
    fc = curves.freq()
    ax = fig.add_subplot(111)
    m, lim = req.metric, req.limit_value
    show = _sens_show(m)
    styles = {"S": "-", "T": "--", "CS": "-"}
    for n, lab, col in _labels(curves, worst):
        for k in show:
            ax.loglog(*_thin(fc.w[n], np.abs(getattr(fc, k)[n])), color=col, ls=styles[k], lw=1.5,
                      label=f"|{k}| {lab}")
    if m in ("peak_sensitivity", "peak_complementary_sensitivity", "peak_control_sensitivity",
             "sensitivity_below", "complementary_sensitivity_above"):
        name = {"peak_sensitivity": "Ms", "peak_complementary_sensitivity": "Mt"}.get(m, "bound")
        ax.axhline(lim, color=PALETTE["limit"], ls="--", lw=1.3,
                   label=f"{name} limit {req.limit_text}")
        f = (req.settings or {}).get("frequency")
        if f is not None:
            ax.axvline(float(f), color=PALETTE["extra"], ls=":", lw=1.2,
                       label=f"frequency setting {_num(float(f))} rad/s")
        if res and res.value is not None and math.isfinite(res.value):
            ax.axhline(res.value, color=PALETTE["value"], ls="-.", lw=1,
                       label=f"ledger worst value {_num(res.value)}")
    elif m == "bandwidth":
        n0 = worst if worst in fc.T else curves.variants[0]
        t0 = float(np.abs(fc.T[n0][0]))
        ax.axhline(t0 * 10 ** (-3 / 20), color=PALETTE["extra"], ls=":", lw=1,
                   label="-3 dB of |T(0)| (worst)")
        ax.axvline(lim, color=PALETTE["limit"], ls="--", lw=1.3,
                   label=f"bandwidth limit {req.limit_text}")
        if res and res.value is not None and math.isfinite(res.value):
            ax.axvline(res.value, color=PALETTE["value"], ls="-.", lw=1.2,
                       label=f"bandwidth (ledger) {_num(res.value)} rad/s")
    _freq_range(ax, fc, curves.variants)
    _fit_log_y(ax)
    ax.set_xlabel("frequency w (rad/s)")
    ax.set_ylabel("magnitude (ratio)")
    ax.set_title("Closed-loop magnitudes with their bounds")
    ax.grid(True, which="both", alpha=0.3)


def _alpha_from_limit(metric: str, lim: float) -> float:
    if metric == "disk_gain_margin":
        g = 10 ** (lim / 20.0)
        return 2.0 * (g - 1.0) / (g + 1.0)
    if metric == "disk_phase_margin":
        return 2.0 * math.tan(math.radians(lim) / 2.0)
    return lim


def _draw_disk(fig, curves, req, res, worst):
    fc = curves.freq()
    ax = fig.add_subplot(111)
    for n, lab, col in _labels(curves, worst):
        ax.semilogx(*_thin(fc.w[n], np.abs(fc.S[n] - fc.T[n])), color=col, lw=1.5,
                    label=f"|S - T| {lab}")
    a = _alpha_from_limit(req.metric, req.limit_value)
    if a > 0:
        ax.axhline(2.0 / a, color=PALETTE["limit"], ls="--", lw=1.3,
                   label=f"bound 2/alpha = {_num(2 / a)} for limit {req.limit_text}")
    _freq_range(ax, fc, curves.variants)
    ax.set_ylim(bottom=0.0)
    ax.set_xlabel("frequency w (rad/s)")
    ax.set_ylabel("|S - T| (ratio)")
    ax.set_title("Balanced disk margin: alpha = 2 / max |S - T|")
    ax.grid(True, which="both", alpha=0.3)


def _draw_poles(fig, curves, req, res, worst):
    poles = curves.poles()
    if poles is None:
        return _draw_bode(fig, curves, req, res, worst)
    ax = fig.add_subplot(111)
    allp = np.concatenate([p for p in poles.values()] + [np.zeros(1)])
    for (n, lab, col), mk in zip(_labels(curves, worst), ("x", "+")):
        p = poles[n]
        ax.plot(p.real, p.imag, mk, color=col, ms=8, mew=1.6, label=f"closed-loop poles, {lab}")
    mags = np.abs(allp[allp != 0])
    near = mags[mags <= 20.0 * mags.min()] if mags.size else np.ones(1)
    span = float(near.max()) * 1.3 or 1.0
    hidden = int(sum(np.sum(np.abs(p) > span) for p in poles.values()))
    if hidden:
        ax.plot([], [], " ", label=f"{hidden} faster pole(s) beyond the frame")
    ax.axvline(0.0, color=PALETTE["extra"], lw=0.8, label="imaginary axis")
    lim, m = req.limit_value, req.metric
    if m == "min_damping" and 0 <= lim <= 1:
        th = math.acos(lim)
        r = np.array([0.0, span])
        ax.plot(-r * math.cos(th), r * math.sin(th), "--", color=PALETTE["limit"], lw=1.3,
                label=f"damping limit {req.limit_text}")
        ax.plot(-r * math.cos(th), -r * math.sin(th), "--", color=PALETTE["limit"], lw=1.3)
    elif m == "decay_rate":
        ax.axvline(-lim, color=PALETTE["limit"], ls="--", lw=1.3,
                   label=f"decay-rate limit {req.limit_text}")
    ax.set_xlim(-span, span * 0.3)
    ax.set_ylim(-span, span)
    ax.set_xlabel("real part (1/s)")
    ax.set_ylabel("imaginary part (rad/s)")
    ax.set_title("Closed-loop poles" + (" (discrete: s = ln z / Ts)" if curves.assembly.dt else ""))
    ax.grid(True, alpha=0.3)


_RADS_TEXT = re.compile(r"(-?\d+(?:\.\d*)?(?:e[-+]?\d+)?) rad/s")


def _axes_to_hz(fig) -> None:
    """Turn the frequency axes of ``fig`` (drawn in rad/s) into Hz: line data, limits, the
    axis label and the frequencies written in legend labels (f = w / 2 pi)."""
    k = 1.0 / (2.0 * math.pi)
    for ax in fig.axes:
        if ax.get_xscale() != "log":
            continue
        lo, hi = ax.get_xlim()
        for line in ax.get_lines():
            x = np.asarray(line.get_xdata(), float)
            line.set_xdata(x * k)
            lab = line.get_label()
            if lab and not lab.startswith("_"):
                line.set_label(_RADS_TEXT.sub(lambda m: f"{_num(float(m[1]) * k)} Hz", lab))
        ax.set_xlim(lo * k, hi * k)
        ax.set_xlabel(ax.get_xlabel().replace("frequency w (rad/s)", "frequency f (Hz)"))


def entry_plot(curves, requirement, result, *, width_in: float = 10.0,
               height_in: float = 3.8, frequency_unit: str = "Hz", views=None):
    """The evidence figure of one entry as a matplotlib ``Figure`` (no pyplot state).

    Parameters
    ----------
    curves : ColumnCurves
        The entry's revision rebuilt round its nominal and worst variants.
    requirement : RequirementInfo
    result : ResultInfo or None
    width_in, height_in : float
        Figure size in inches (the Bode plot is 1.5 times taller).
    frequency_unit : str
        ``"Hz"`` (default) or ``"rad/s"``: the unit of frequency axes (log axes, real tick
        values).
    views : LoopViews, optional
        The revision's family views (:func:`ledger.loopviews.loop_views`): measured members
        are added to the loop-gain Bode plot, and ``fit`` entries need them.

    Raises
    ------
    LedgerError
        The curves cannot be computed (for example an unstable loop's step response).
    """
    require("matplotlib")
    from matplotlib.figure import Figure

    kind = figure_kind(requirement.metric)
    worst = result.worst_variant if result else ""
    tall = kind in ("bode", "fit") or (kind == "poles" and curves.poles() is None)
    fig = Figure(figsize=(width_in, height_in * (1.5 if tall else 1.0)))
    out_unit = f" ({curves.output_unit})" if curves.output_unit else ""
    in_unit = f" ({curves.input_unit})" if curves.input_unit else ""
    if kind == "step":
        _draw_step(fig, curves, requirement, result, worst)
    elif kind == "effort":
        _draw_band_path(fig, curves, requirement, result, worst, "r->u",
                        f"controller output u{in_unit}", "Control effort r -> u")
    elif kind == "error":
        _draw_band_path(fig, curves, requirement, result, worst, "r->e",
                        f"error e{out_unit}", "Error r -> e")
    elif kind == "disturbance":
        _draw_band_path(fig, curves, requirement, result, worst, "d->y",
                        f"output y{out_unit}", "Input-disturbance response d -> y")
    elif kind == "move":
        from .moveplots import draw_move

        draw_move(fig, curves, requirement, result, worst, (PALETTE, _labels, _num, _thin))
    elif kind == "sensitivity":
        _draw_sens(fig, curves, requirement, result, worst)
    elif kind == "disk":
        _draw_disk(fig, curves, requirement, result, worst)
    if kind in ("sensitivity", "disk") and views is not None:
        from .loopplots import overlay_closed

        overlay_closed(fig.axes[0], views, worst,
                       ("S-T",) if kind == "disk" else _sens_show(requirement.metric))
    elif kind == "poles":
        _draw_poles(fig, curves, requirement, result, worst)
    elif kind == "fit" and views is not None:
        from .loopplots import draw_fit

        draw_fit(fig, views, requirement, result, worst)
    else:
        _draw_bode(fig, curves, requirement, result, worst)
        if views is not None:
            from .loopplots import overlay_measured

            overlay_measured(*fig.axes[:2], views, worst)
    if frequency_unit == "Hz" and kind in ("bode", "sensitivity", "disk", "poles", "fit"):
        _axes_to_hz(fig)
    _finish(fig, fig.axes)
    return fig


def entry_figure(curves, requirement, result, **size) -> str:
    """The evidence figure of one entry as inline SVG text (see :func:`entry_plot`)."""
    return _svg(entry_plot(curves, requirement, result, **size))
