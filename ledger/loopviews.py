"""Loop-gain views of a whole plant family: Nyquist and Nichols curves, the Bode overlay of
model and measured members, and the geometry drawn with them (the critical point, the Ms
circle, the exclusion disk of the balanced disk margin, closed-loop M-contours).

One home for the HTML evidence (:mod:`ledger.exports.loopplots`) and the terminal UI's plot
view (:mod:`ledger.tui.plotdata`).  For one revision the family, controller and loop are
rebuilt with :meth:`ledger.api.Ledger.numeric_setup` (what verification uses).  Model members
are closed with :func:`ledger.engine.loop.assemble` and their loop gain evaluated exactly on the
engine's frequency grid; a measured member's loop gain is
``L(jw) = C(jw) H(jw) G(jw) e^{-jw tau}`` at its measured points (the points verification keeps,
and apart from them those left out for low coherence), as in :mod:`ledger.engine.measured`.
Ms and the disk margin of every member drawn are the engine's own
(:func:`ledger.engine.measure.measure_family`); verdicts are never recomputed here.

Geometry (closed forms; ``h = alpha / 2``):

* Ms circle: centre -1, radius ``1/Ms`` (``|1 + L| >= 1/Ms`` is ``|S| <= Ms``);
* disk-margin exclusion disk: the balanced disk margin ``alpha = 1 / sup |S - 1/2|``
  (:func:`ledger.engine.margins.disk_margin`) keeps ``|S - 1/2| <= 1/alpha``, that is
  ``|1 + L| >= h |1 - L|``; for ``h < 1`` the excluded set is the disk with centre
  ``-(1 + h^2)/(1 - h^2)`` and radius ``2h/(1 - h^2)``, whose diameter on the real axis runs
  from ``-(1+h)/(1-h)`` to ``-(1-h)/(1+h)`` (the gain interval of the disk margin);
* M-contour ``|T| = M`` with ``T = L/(1+L)``: for ``M != 1`` the circle with centre
  ``-M^2/(M^2 - 1)`` and radius ``M/|M^2 - 1|``; for ``M = 1`` the line ``Re L = -1/2``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .errors import LedgerError, NotFoundError

__all__ = ["MemberCurve", "LoopViews", "loop_views", "ms_circle", "disk_region",
           "m_contour", "nichols_phase", "frequency_marks", "pick_members", "M_CONTOURS_DB",
           "MAX_MEMBERS"]

#: closed-loop magnitudes |T| (dB) drawn as M-contours on the Nichols chart
M_CONTOURS_DB = (12.0, 6.0, 3.0, 1.0, 0.0, -1.0, -3.0, -6.0, -12.0)
#: members drawn at most (nominal, the highlighted ones and every measured member always)
MAX_MEMBERS = 40
#: frequency-grid settings of the model curves
VIEW_FREQ_GRID = {"points_per_decade": 60, "max_points": 20_000}


@dataclass(frozen=True, eq=False)
class MemberCurve:
    """One family member's loop gain (and plant response) for drawing.

    Attributes
    ----------
    name, kind : str
        Variant name and kind (``nominal``, ``corner``, ``sample``, ``fidelity``,
        ``measured``).
    w : ndarray
        Frequencies, rad/s (a model's display grid; a measurement's kept points).
    L : ndarray (complex)
        Loop gain at ``w``.
    G : ndarray (complex)
        Plant response at ``w`` (its own delay included).
    w_excluded, L_excluded, G_excluded : ndarray
        A measurement's points left out for low coherence (empty for models).
    ms : float
        Peak sensitivity from the engine (``nan`` when it has none: the reason in ``note``).
    alpha : float
        Balanced disk margin from the engine (``nan`` likewise).
    note : str
    """

    name: str
    kind: str
    w: np.ndarray
    L: np.ndarray
    G: np.ndarray
    w_excluded: np.ndarray
    L_excluded: np.ndarray
    G_excluded: np.ndarray
    ms: float
    alpha: float
    note: str = ""

    @property
    def measured(self) -> bool:
        return self.kind == "measured"


@dataclass(frozen=True, eq=False)
class LoopViews:
    """Loop gains of the members drawn, in family order (nominal first).

    Attributes
    ----------
    loop, revision : str
    members : tuple of MemberCurve
    total : int
        Members in the family (``len(members)`` or more when some are not drawn).
    dt : float or None
        Sample time of a digital loop.
    skipped : tuple of str
        Members that could not be drawn, each with its reason (``name: reason``).
    """

    loop: str
    revision: str
    members: tuple
    total: int
    dt: float | None = None
    skipped: tuple = ()

    def member(self, name: str) -> MemberCurve:
        for m in self.members:
            if m.name == name:
                return m
        raise NotFoundError(f"variant {name!r} is not among the members drawn")

    @property
    def names(self) -> tuple:
        return tuple(m.name for m in self.members)

    def worst_disk(self) -> str:
        """The member with the smallest disk margin (the nominal when none has one)."""
        have = [m for m in self.members if math.isfinite(m.alpha)]
        return min(have, key=lambda m: m.alpha).name if have else self.members[0].name

    def highlight(self, worst: str | None) -> str:
        """``worst`` when it is drawn, else the member with the smallest disk margin."""
        return worst if worst in self.names else self.worst_disk()


# --------------------------------------------------------------------------- geometry

def ms_circle(ms: float, n: int = 361) -> tuple[complex, float, np.ndarray]:
    """(centre, radius, boundary points) of the Ms circle: centre -1, radius 1/Ms."""
    if not (ms > 0 and math.isfinite(ms)):
        raise ValueError(f"Ms must be finite and > 0, got {ms!r}")
    r = 1.0 / ms
    th = np.linspace(0.0, 2.0 * math.pi, n)
    return -1.0 + 0j, r, -1.0 + r * np.exp(1j * th)


def disk_region(alpha: float, n: int = 361):
    """(centre, radius, boundary points) of the region of the Nyquist plane the loop gain
    must avoid for a balanced disk margin ``alpha`` (see the module docstring); ``None`` when
    ``alpha <= 0`` or ``alpha >= 2`` (then the region is no longer a bounded disk)."""
    if not (0.0 < alpha < 2.0):
        return None
    h = alpha / 2.0
    c = -(1.0 + h * h) / (1.0 - h * h)
    r = 2.0 * h / (1.0 - h * h)
    th = np.linspace(0.0, 2.0 * math.pi, n)
    return complex(c), r, c + r * np.exp(1j * th)


def m_contour(m_db: float, n: int = 721) -> tuple[np.ndarray, np.ndarray]:
    """The closed-loop contour ``|L/(1+L)| = 10^(m_db/20)`` on the Nichols chart:
    (open-loop phase in deg in [-360, 0], open-loop gain in dB); for ``m_db > 0`` a closed
    curve round (-180 deg, 0 dB), else ordered by phase."""
    M = 10.0 ** (m_db / 20.0)
    if abs(M - 1.0) < 1e-12:
        # Re L = -1/2: |L| = 1/(2 |cos phi|) for phase in (-270, -90) deg
        ph = np.linspace(-270.0, -90.0, n)[1:-1]
        gain = -20.0 * np.log10(-2.0 * np.cos(np.radians(ph)))
        return ph, gain
    c = -M * M / (M * M - 1.0)
    r = M / abs(M * M - 1.0)
    th = np.linspace(0.0, 2.0 * math.pi, n, endpoint=False)
    L = c + r * np.exp(1j * th)
    ph = np.degrees(np.angle(L))
    ph = np.where(ph > 0, ph - 360.0, ph)
    gain = 20.0 * np.log10(np.abs(L))
    if M > 1:
        # a closed curve round the critical point (the circle does not reach L = 0)
        return np.append(ph, ph[0]), np.append(gain, gain[0])
    # the circle encloses L = 0: the phase runs once through [-360, 0]
    order = np.argsort(ph)
    return ph[order], gain[order]


def nichols_phase(L: np.ndarray) -> np.ndarray:
    """Unwrapped phase of ``L`` in deg, moved by whole turns so that it lies in
    [-360, 0) where the curve is nearest to |L| = 1 (where the critical point -180 deg,
    0 dB is judged)."""
    ph = np.degrees(np.unwrap(np.angle(L)))
    if ph.size == 0:
        return ph
    k = int(np.argmin(np.abs(np.log(np.abs(L)))))
    return ph - 360.0 * math.floor((ph[k] + 360.0) / 360.0)


def align_points(w_pts, L_pts, w, ph_curve) -> np.ndarray:
    """Phase (deg) of scattered points on the branch of a curve's phase ``ph_curve`` at
    ``w``: each point's phase moved by whole turns to within 180 deg of the curve."""
    if np.size(w_pts) == 0:
        return np.zeros(0)
    ref = np.interp(np.log(w_pts), np.log(w), ph_curve)
    ph = np.degrees(np.angle(L_pts))
    return ph + 360.0 * np.round((ref - ph) / 360.0)


def frequency_marks(w: np.ndarray, L: np.ndarray, *, hz: bool = True, max_marks: int = 8,
                    window: float | None = 4.0) -> list[tuple[int, str]]:
    """Where to write frequencies along a curve: ``(index into w, label)`` at every decade of
    the frequency unit, at the gain crossovers (``|L| = 1``, labelled ``wc``) and at resonant
    peaks of ``|L|`` (a local maximum standing 3 dB above its neighbourhood, ``peak``); only
    where ``|L| <= window`` when ``window`` is given (the visible part of a Nyquist plot).
    At most ``max_marks``, the crossover and the peaks first."""
    w = np.asarray(w, float)
    L = np.asarray(L, complex)
    if w.size < 2:
        return []
    k = 1.0 / (2.0 * math.pi) if hz else 1.0
    unit = "Hz" if hz else "rad/s"
    f = w * k
    mag = np.abs(L)
    # on a Nyquist plot only the visible part, and not where the curve crowds the origin
    vis = np.ones(w.size, bool) if window is None else (mag <= window) & (mag >= window / 40)
    out: dict[int, str] = {}
    lg = np.log(np.maximum(mag, 1e-300))
    for i in np.flatnonzero(np.sign(lg[:-1]) * np.sign(lg[1:]) < 0):
        j = int(i if abs(lg[i]) <= abs(lg[i + 1]) else i + 1)
        out[j] = f"wc {f[j]:.3g} {unit}"
    db = 20.0 * np.log10(np.maximum(mag, 1e-300))
    lw = np.log10(w)
    for i in range(1, w.size - 1):
        near = np.abs(lw - lw[i]) <= 0.1
        if db[i] < np.max(db[near]) or lw[i] - 0.15 < lw[0] or lw[i] + 0.15 > lw[-1]:
            continue
        # 3 dB above the straight line (log-log) between the points 0.15 decade either side
        base = 0.5 * (np.interp(lw[i] - 0.15, lw, db) + np.interp(lw[i] + 0.15, lw, db))
        if db[i] - base >= 3.0:
            out.setdefault(i, f"peak {f[i]:.3g} {unit}")
    first = list(out)
    for d in range(math.ceil(math.log10(f[0])), math.floor(math.log10(f[-1])) + 1):
        j = int(np.argmin(np.abs(np.log10(f) - d)))
        if abs(math.log10(f[j]) - d) < 0.05:
            out.setdefault(j, f"{10.0 ** d:g} {unit}")
    picked = [j for j in first if vis[j]] + [j for j in out if j not in first and vis[j]]
    return [(j, out[j]) for j in sorted(picked[:max_marks])]


# --------------------------------------------------------------------------- curves

def pick_members(variants, wanted=(), limit: int = MAX_MEMBERS) -> list[int]:
    """Positions of the members to draw, in family order: the nominal, the ``wanted`` names
    and every measured member always; the others evenly spread up to ``limit`` in all."""
    wanted = set(wanted)
    must = [i for i, v in enumerate(variants)
            if i == 0 or v.name in wanted or v.kind == "measured"]
    rest = [i for i in range(len(variants)) if i not in set(must)]
    room = max(0, limit - len(must))
    if len(rest) > room:
        rest = [rest[int(k)] for k in np.unique(np.linspace(0, len(rest) - 1, room).round())] \
            if room else []
    return sorted(must + rest)


def _model_curves(fam, controller, loop_spec, pos, skipped):
    from .engine.freqresp import frequency_grid
    from .engine.loop import assemble
    from .engine.measured import _eval
    from .engine.types import PlantFamily

    out = {}
    sub = PlantFamily(tuple(fam.variants[i] for i in pos))
    try:
        asm = assemble(sub, controller, loop_spec)
    except LedgerError as e:
        skipped.extend(f"{fam.variants[i].name}: {e}" for i in pos)
        return out, None
    for g in asm.groups:
        w = frequency_grid(g.loop_gain, **VIEW_FREQ_GRID)
        w = w[w > 0]
        L = g.loop_gain.evaluate(w)
        for j, i in enumerate(np.asarray(g.index)):
            v = sub.variants[int(i)]
            dt = getattr(v.system, "dt", 0) or 0
            x = np.exp(1j * w * dt) if dt and dt is not True else 1j * w  # z for a sampled plant
            with np.errstate(all="ignore"):
                G = _eval(v.system, x) * np.exp(-1j * w * v.delay)
            out[pos[int(i)]] = (w, L[j], G)
    return out, asm.dt


def _measured_curve(v, controller, loop_spec):
    """(w, L, G, w_excl, L_excl, G_excl) of a measured member (raises a LedgerError when its
    loop cannot be formed, e.g. in a digital loop)."""
    from .engine.measured import MeasuredLoop, _eval

    meas = v.system
    ml = MeasuredLoop(meas, controller, loop_spec, v.delay)  # the refusals verification has

    def at(w, g):
        s = 1j * w
        return _eval(controller, s) * _eval(loop_spec.sensor, s) * g * np.exp(-s * ml.tau)

    keep = meas.used
    w, g = meas.omega[keep], meas.response[keep]
    wx, gx = meas.omega[~keep], meas.response[~keep]
    gd = np.exp(-1j * w * v.delay)
    gxd = np.exp(-1j * wx * v.delay)
    return w, at(w, g), g * gd, wx, at(wx, gx), gx * gxd


def _engine_values(fam, controller, loop_spec):
    """(Ms, alpha, notes) per member of ``fam`` from the engine."""
    from .engine.measuring import measure_family

    V = len(fam.variants)
    nan = np.full(V, np.nan)
    try:
        res = measure_family(fam, controller, loop_spec,
                                     [("peak_sensitivity", {}), ("disk_margin", {})])
    except LedgerError as e:
        return nan, nan.copy(), [str(e)] * V
    by = {r.name: r for r in res.results.values()}
    ms, alpha = by["peak_sensitivity"], by["disk_margin"]
    notes = [""] * V
    ms_v, a_v = np.array(ms.values, float), np.array(alpha.values, float)
    for k, v in enumerate(fam.variants):
        why = ms.variant_errors.get(v.name) or alpha.variant_errors.get(v.name)
        if v.name in ms.variant_errors:
            ms_v[k] = np.nan
        if v.name in alpha.variant_errors:
            a_v[k] = np.nan
        notes[k] = why or ""
    return ms_v, a_v, notes


def loop_views(lg, loop: str, label: str | None = None, *, wanted=(),
               max_members: int = MAX_MEMBERS) -> LoopViews:
    """The loop gain of every member of a revision's plant family (at most ``max_members``:
    the nominal, ``wanted`` and every measured member always), with the engine's Ms and
    disk margin of each.

    Parameters
    ----------
    lg : Ledger
    loop, label : str
        The revision (default: the loop's tip).
    wanted : iterable of str
        Variant names that must be drawn (e.g. the worst variant of a requirement).

    Raises
    ------
    LedgerError
        The revision cannot be rebuilt.
    """
    from .engine.types import PlantFamily

    rev = lg.revision(loop, label)
    fam, controller, loop_spec = lg.numeric_setup(loop, rev.label)
    pos = pick_members(fam.variants, wanted, max_members)
    picked = PlantFamily(tuple(fam.variants[i] for i in pos))
    ms, alpha, notes = _engine_values(picked, controller, loop_spec)
    skipped: list[str] = []
    model_pos = [k for k, i in enumerate(pos) if fam.variants[i].kind != "measured"]
    models, dt = _model_curves(picked, controller, loop_spec, model_pos, skipped)
    members = []
    empty = np.zeros(0)
    for k, v in enumerate(picked.variants):
        if v.kind == "measured":
            try:
                w, L, G, wx, Lx, Gx = _measured_curve(v, controller, loop_spec)
            except LedgerError as e:
                skipped.append(f"{v.name}: {e}")
                continue
        elif k in models:
            w, L, G = models[k]
            wx, Lx, Gx = empty, empty.astype(complex), empty.astype(complex)
        else:
            continue
        members.append(MemberCurve(v.name, v.kind, w, L, G, wx, Lx, Gx, float(ms[k]),
                                   float(alpha[k]), notes[k]))
    if not members:
        raise NotFoundError(f"no member of the plant family of loop {loop!r} can be drawn: "
                            + "; ".join(skipped[:2]))
    return LoopViews(loop, rev.label, tuple(members), len(fam.variants), dt, tuple(skipped))
