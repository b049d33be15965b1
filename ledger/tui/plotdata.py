"""Numbers behind the plot view: step response and loop-gain frequency response of one
revision on one plant variant, rebuilt through the one home of a revision's curves
(:func:`ledger.curves.revision_curves`, the same helpers verification uses).  Run in a worker; the
engine is imported here lazily so that the UI starts fast.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["Bound", "PlotData", "load_plot_data", "worst_variant"]


@dataclass(frozen=True)
class Bound:
    """A requirement drawn on the step plot: ``kind`` is ``overshoot`` (a level, output
    units), ``settling`` (a time, s, with the +-band around the final value) or ``rise``."""

    key: str
    kind: str
    value: float
    text: str


@dataclass(frozen=True, eq=False)
class PlotData:
    """Step response (t in s, y in output units) and L(jw) (w in rad/s, dB, deg)."""

    loop: str
    label: str
    variant: str
    t: np.ndarray
    y: np.ndarray
    final: float
    bounds: tuple
    w: np.ndarray
    mag_db: np.ndarray
    phase_deg: np.ndarray
    gain_margin_db: float
    phase_crossover: float
    phase_margin_deg: float
    gain_crossover: float
    settle_band: float = 0.02


def worst_variant(results) -> str:
    """The variant behind the worst result of a revision (lowest headroom fraction, failing
    results first); ``"nominal"`` when no result names one."""
    named = [r for r in results if r.worst_variant and r.worst_variant != "*"]
    if not named:
        return "nominal"

    def rank(r):
        frac = r.headroom_fraction if r.headroom_fraction is not None else -math.inf
        return (r.verdict != "fail", frac)

    return min(named, key=rank).worst_variant


def _thin(t: np.ndarray, y: np.ndarray, n: int = 400):
    if t.size <= n:
        return t, y
    idx = np.unique(np.linspace(0, t.size - 1, n).round().astype(int))
    return t[idx], y[idx]


def load_plot_data(lg, loop: str, label: str | None = None, *, variant: str | None = None
                   ) -> PlotData:
    """Rebuild the loop of ``loop/label`` on ``variant`` (default: nominal) and compute its
    step response and loop-gain frequency response (:func:`ledger.curves.revision_curves`
    with the engine's own grids)."""
    from ..curves import revision_curves

    rev = lg.revision(loop, label)
    name = variant or "nominal"
    curves = revision_curves(lg, loop, rev.label, [name], include_nominal=False, grid={},
                             freq_grid={})
    st, fr = curves.step("r->y"), curves.freq()
    t, y = _thin(st.t[name], st.y[name])
    w = fr.w[name]
    L = fr.L[name]
    mag = 20 * np.log10(np.abs(L))
    ph = np.degrees(np.unwrap(np.angle(L)))
    idx = np.unique(np.geomspace(1, w.size, min(w.size, 400)).round().astype(int) - 1)
    final = st.final[name]
    bounds = []
    checks = [r for r in lg.requirements(loop=loop) if r.metric and r.status != "retired"]
    for c in checks:
        kind = {"overshoot": "overshoot", "settling_time": "settling", "rise_time": "rise"}.get(c.metric)
        if kind is None:
            continue
        val = c.limit_value
        if kind == "overshoot":
            val = float(final) * (1 + c.limit_value / 100.0)
        bounds.append(Bound(c.key, kind, float(val), f"{c.key} {c.metric} {c.limit_text}"))
    return PlotData(loop, rev.label, name, t, y, float(final), tuple(bounds), w[idx],
                    mag[idx], ph[idx], float(fr.gain_margin[name]), float(fr.phase_crossover[name]),
                    float(fr.phase_margin[name]), float(fr.gain_crossover[name]))
