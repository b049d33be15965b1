"""Evidence figure of a large-move requirement: the simulated move through the actuator limits
beside the linear response to the same step, with the intervals the actuator is at a limit (or
slewing at its rate limit) shaded, and the requirement's limit drawn (:mod:`ledger.exports.plots`
dispatches here; the numbers come from :meth:`ledger.curves.ColumnCurves.move`)."""

from __future__ import annotations

import math

import numpy as np

__all__ = ["draw_move", "move_amplitude"]


def move_amplitude(req, output_unit: str) -> float:
    """The requirement's move amplitude in the plant's output unit."""
    from ..units import quantity_in

    return quantity_in((req.settings or {}).get("move", 1.0), output_unit)


def draw_move(fig, curves, req, res, worst, kit) -> None:
    """Large move (solid) and linear step of the same amplitude (dashed) for the nominal and
    the worst variant; saturation intervals of the worst variant shaded.  ``kit``: the
    figure helpers of :mod:`ledger.exports.plots` (palette, variant labels, number text,
    thinning), handed in so that this module does not import that one."""
    PALETTE, _labels, _num, _thin = kit

    ax = fig.add_subplot(111)
    R = move_amplitude(req, curves.output_unit)
    moves = curves.move(R)
    lin = curves.step("r->y", R)
    unit = f" ({curves.output_unit})" if curves.output_unit else ""
    ds = "steps-post" if curves.assembly.dt else "default"
    w = worst if worst in moves else curves.variants[0]
    t_end = 0.0
    for n, lab, col in _labels(curves, worst):
        t, y, sat, yf = moves[n]
        ax.plot(*_thin(t, y), color=col, lw=1.7, label=f"large move, {lab}", drawstyle=ds)
        keep = lin.t[n] <= t[-1]
        ax.plot(*_thin(lin.t[n][keep], lin.y[n][keep]), color=col, lw=1.0, ls="--",
                label=f"linear step, {lab}", drawstyle=ds)
        t_end = max(t_end, float(t[-1]))
    t, y, sat, yf = moves[w]
    for k, (a, b) in enumerate(sat):
        ax.axvspan(a, b, color=PALETTE["band"], alpha=0.55,
                   label="actuator at its limit (worst)" if k == 0 else None)
    ax.axhline(yf, color=PALETTE["extra"], ls=":", lw=1, label=f"final value {_num(yf)}")
    st = req.settings or {}
    lim, val = req.limit_value, res.value if res else None
    if req.metric == "move_settling_time":
        band = float(st.get("settling_band", 0.02))
        ax.axhspan(yf - band * abs(yf), yf + band * abs(yf), color=PALETTE["extra"], alpha=0.2,
                   label=f"settling band +-{_num(100 * band)} %")
        ax.axvline(lim, color=PALETTE["limit"], ls="--", lw=1.3,
                   label=f"settling-time limit {req.limit_text}")
    elif req.metric == "move_overshoot":
        ax.axhline(yf * (1 + lim / 100.0), color=PALETTE["limit"], ls="--", lw=1.3,
                   label=f"overshoot limit {req.limit_text}")
    elif req.metric == "move_time_saturated":
        ax.plot([], [], " ", label=f"time saturated limit {req.limit_text}")
    if val is not None and math.isfinite(val) and req.metric in ("move_settling_time",):
        ax.axvline(val, color=PALETTE["value"], ls="-.", lw=1.2,
                   label=f"settling time (ledger, worst) {_num(val)} s")
    elif val is not None:
        ax.plot([], [], " ", label=f"ledger value (worst) {_num(val)}")
    ends = [x for x in (lim if req.metric == "move_settling_time" else None, val)
            if x is not None and math.isfinite(x) and req.metric == "move_settling_time"]
    quiet = float(t[np.flatnonzero(np.abs(y - yf) > 0.002 * abs(yf))[-1]]) \
        if np.any(np.abs(y - yf) > 0.002 * abs(yf)) else t_end
    ax.set_xlim(0.0, min(t_end, max([1.4 * quiet] + [1.15 * e for e in ends])))
    ax.set_xlabel("time t (s)")
    ax.set_ylabel(f"output y{unit}")
    ax.grid(True, alpha=0.3)
    ax.set_title(f"Large move r -> y, amplitude {_num(R)}{unit}, actuator limited")
