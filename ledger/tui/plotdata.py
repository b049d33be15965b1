"""Numbers behind the plot view: step response and loop-gain frequency response of one
revision on one plant variant, rebuilt with the same helpers verification uses
(``ledger.verify.family_for``, ``loop_spec_for``, ``controller_for``).  Run in a worker; the
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
    step response and loop-gain frequency response."""
    from ..engine.freqresp import frequency_grid
    from ..engine.loop import assemble
    from ..engine.margins import margins
    from ..engine.timeresp import step_response
    from ..engine.types import PlantFamily
    from ..errors import NotFoundError

    rev = lg.revision(loop, label)
    fam, controller, loop_spec = lg.numeric_setup(loop, rev.label)
    name = variant or "nominal"
    if name not in fam.names:
        raise NotFoundError(f"plant family of loop {loop!r} has no variant {name!r}")
    v = fam.variants[fam.names.index(name)]
    asm = assemble(PlantFamily((v,)), controller, loop_spec)
    grp = asm.groups[0]
    sr = step_response(grp.paths["r->y"])
    t, y = _thin(sr.t, sr.y[0])
    fb = grp.loop_gain
    w = frequency_grid(fb)
    w = w[w > 0]
    L = fb.evaluate(w)[0]
    mag = 20 * np.log10(np.abs(L))
    ph = np.degrees(np.unwrap(np.angle(L)))
    idx = np.unique(np.geomspace(1, w.size, min(w.size, 400)).round().astype(int) - 1)
    m = margins(fb)
    bounds = []
    checks = [r for r in lg.requirements(loop=loop) if r.metric and r.status != "retired"]
    for c in checks:
        kind = {"overshoot": "overshoot", "settling_time": "settling", "rise_time": "rise"}.get(c.metric)
        if kind is None:
            continue
        val = c.limit_value
        if kind == "overshoot":
            val = float(sr.final[0]) * (1 + c.limit_value / 100.0)
        bounds.append(Bound(c.key, kind, float(val), f"{c.key} {c.metric} {c.limit_text}"))
    return PlotData(loop, rev.label, name, t, y, float(sr.final[0]), tuple(bounds), w[idx],
                    mag[idx], ph[idx], float(m.gain_margin[0]), float(m.phase_crossover[0]),
                    float(m.phase_margin[0]), float(m.gain_crossover[0]))
