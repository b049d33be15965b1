"""Numbers behind the plot view: step response and loop-gain frequency response of one
revision on one plant variant, rebuilt through the one home of a revision's curves
(:func:`ledger.curves.revision_curves`, the same helpers verification uses).  Run in a worker; the
engine is imported here lazily so that the UI starts fast.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["Bound", "PlotData", "MoveView", "load_plot_data", "worst_variant", "settle_time", "step_horizon",
           "log_ticks"]


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
    #: a large-move requirement's move on this variant (None without one): amplitude
    #: (output units), times (s), the simulated move and the linear step of that amplitude,
    #: and the intervals (s) the actuator is at a limit
    move: "MoveView | None" = None
    #: the family panels (Nyquist, Nichols, measured members on the Bode plot;
    #: :mod:`ledger.tui.familydata`), or None with the reason in ``family_note``
    family: object = None
    family_note: str = ""


@dataclass(frozen=True, eq=False)
class MoveView:
    """The large move shown beside the linear step in the plot view."""

    key: str
    amplitude: float
    t: np.ndarray
    y: np.ndarray
    linear: np.ndarray
    saturated: tuple


def worst_variant(results, *, models_only: bool = False) -> str:
    """The variant behind the worst result of a revision (lowest headroom fraction, failing
    results first); ``"nominal"`` when no result names one.  ``models_only`` passes over
    measured members (``measured:...``: they have no step response)."""
    named = [r for r in results if r.worst_variant and r.worst_variant != "*"
             and not (models_only and r.worst_variant.startswith("measured:"))]
    if not named:
        return "nominal"

    def rank(r):
        frac = r.headroom_fraction if r.headroom_fraction is not None else -math.inf
        return (r.verdict != "fail", frac)

    return min(named, key=rank).worst_variant


def settle_time(t: np.ndarray, y: np.ndarray, final: float, band: float = 0.02) -> float:
    """For display only: the first sample time after which ``y`` stays within
    ``band * |final|`` of ``final`` (the end of ``t`` if it never does).  The ledger's
    settling-time metric is refined by the engine; this only sizes a plot."""
    tol = band * abs(final) if final != 0 else band * float(np.max(np.abs(y)) or 1.0)
    out = np.nonzero(np.abs(np.asarray(y, float) - final) > tol)[0]
    if out.size == 0:
        return float(t[0])
    k = out[-1] + 1
    return float(t[k]) if k < t.size else float(t[-1])


def step_horizon(t: np.ndarray, ys, finals, *, limits=(), factor: float = 3.0,
                 cap: float | None = None) -> float:
    """End of the step plot: ``factor`` times the slowest settling among the plotted
    variants, long enough to show every time limit drawn (x 1.2), at most the simulated end
    (or ``cap``)."""
    ts = max(settle_time(t, y, f) for y, f in zip(ys, finals))
    h = factor * ts if ts > 0 else float(t[-1])
    times = [x for x in limits if x is not None and math.isfinite(x) and x > 0]
    if times:
        h = max(h, 1.2 * max(times))
    end = float(t[-1]) if cap is None else min(float(t[-1]), cap)
    return min(h, end)


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
    t_all, y_all = np.asarray(st.t[name]), np.asarray(st.y[name])
    w = fr.w[name]
    L = fr.L[name]
    mag = 20 * np.log10(np.abs(L))
    ph = np.degrees(np.unwrap(np.angle(L)))
    idx = np.unique(np.geomspace(1, w.size, min(w.size, 400)).round().astype(int) - 1)
    final = st.final[name]
    bounds = []
    checks = [r for r in lg.requirements(loop=loop) if r.metric and r.status != "retired"]
    for c in checks:
        kind = {"overshoot": "overshoot", "settling_time": "settling", "rise_time": "rise",
                "move_settling_time": "settling"}.get(c.metric)
        if kind is None:
            continue
        val = c.limit_value
        if kind == "overshoot":
            val = float(final) * (1 + c.limit_value / 100.0)
        bounds.append(Bound(c.key, kind, float(val), f"{c.key} {c.metric} {c.limit_text}"))
    horizon = step_horizon(t_all, [y_all], [float(final)],
                           limits=[b.value for b in bounds if b.kind in ("settling", "rise")])
    keep = t_all <= horizon
    t, y = _thin(t_all[keep], y_all[keep])
    return PlotData(loop, rev.label, name, t, y, float(final), tuple(bounds), w[idx],
                    mag[idx], ph[idx], float(fr.gain_margin[name]), float(fr.phase_crossover[name]),
                    float(fr.phase_margin[name]), float(fr.gain_crossover[name]),
                    move=_move_view(curves, name, checks))


def _move_view(curves, name: str, checks):
    """The move of the loop's first large-move requirement, or None (none, or it cannot be
    simulated: the plot view then shows the linear step alone)."""
    from ..errors import LedgerError
    from ..units import quantity_in

    req = next((c for c in checks if c.metric.startswith("move_")), None)
    if req is None:
        return None
    try:
        R = quantity_in((req.settings or {}).get("move", 1.0), curves.output_unit)
        t, y, sat, _ = curves.move(R)[name]
    except (LedgerError, KeyError):
        return None
    st = curves.step("r->y", 1.0)
    lin = R * np.interp(t, st.t[name], st.y[name])
    idx = np.unique(np.linspace(0, t.size - 1, min(t.size, 400)).round().astype(int))
    return MoveView(req.key, float(R), t[idx], y[idx], lin[idx], tuple(sat))


def log_ticks(lo: float, hi: float, max_ticks: int = 7) -> tuple[list[float], list[str]]:
    """Tick positions (log10 of the value) and labels (the value itself, e.g. ``0.1``,
    ``10``, ``1k``) for a log axis spanning ``lo..hi`` (both > 0): every decade, or every
    second or third when there are many."""
    a, b = math.floor(math.log10(lo)), math.ceil(math.log10(hi))
    decades = list(range(a, b + 1))
    step = max(1, math.ceil(len(decades) / max_ticks))
    decades = decades[::step]
    names = {3: "k", 6: "M"}

    def label(k: int) -> str:
        if -2 <= k <= 2:
            return f"{10.0 ** k:g}"
        if k in names:
            return f"1{names[k]}"
        return f"1e{k}"

    pos = [float(k) for k in decades if math.log10(lo) - 1e-9 <= k <= math.log10(hi) + 1e-9]
    return pos, [label(int(k)) for k in pos]
