"""The curves of a revision (step responses, loop functions, margins, poles), recomputed from
the engine for plotting only: the one home used by the HTML export and the terminal UI's plot
view.

For one revision column the revision's plant family, controller and loop are rebuilt with the
ledger's own helpers (:meth:`ledger.api.Ledger.numeric_setup`: the plan in a read snapshot, then
``family_for``, ``controller_for``, ``loop_spec_for`` of :mod:`ledger.verification`) and closed with
:func:`ledger.engine.loop.assemble` round the nominal variant and the worst variants the
results name.  Step responses come from :func:`ledger.engine.timeresp.step_response`, loop
functions from the exact frequency-response evaluators of the assembly, margins from
:func:`ledger.engine.margins.margins`.  Verdicts and metric values are never recomputed here:
the plots show the ledger's values next to the curves.

The plant family is the loop's *latest* plant version (what a stale result is measured
against is older); the HTML says so for stale entries.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .errors import LedgerError, NotFoundError

__all__ = ["StepCurves", "FreqCurves", "ColumnCurves", "column_curves", "revision_curves",
           "DISPLAY_GRID"]

#: Time-grid settings for display (looser than verification: samples stay exact for
#: delay-free loops; the method of steps for delays is accurate to about 1e-3 relative).
DISPLAY_GRID = {"settle_factor": 10.0, "points_per_period": 16.0, "delay_rtol": 1e-3,
                "max_samples": 100_000, "tail_rtol": 1e-4}
#: Frequency-grid settings for display.
DISPLAY_FREQ_GRID = {"points_per_decade": 60, "max_points": 20_000}


@dataclass(frozen=True)
class StepCurves:
    """Step responses of one signal path.

    Attributes
    ----------
    t : dict of str -> ndarray
        Sample times per variant, s.
    y : dict of str -> ndarray
        Output per variant, in the path's output units.
    final : dict of str -> float
        Final value per variant (final-value theorem).
    amplitude : float
        Step amplitude, input units.
    """

    t: dict
    y: dict
    final: dict
    amplitude: float


@dataclass(frozen=True)
class FreqCurves:
    """Frequency responses per variant (rad/s grid without w = 0).

    Attributes
    ----------
    w : dict of str -> ndarray
        Frequencies, rad/s.
    L, S, T, CS : dict of str -> complex ndarray
        Loop gain, sensitivity, complementary sensitivity, controller times sensitivity.
    gain_margin, phase_margin : dict of str -> float
        Upper gain margin (dB) and worst phase margin (deg); ``inf`` when there is none.
    phase_crossover, gain_crossover : dict of str -> float
        Their frequencies, rad/s (``inf`` when none).
    """

    w: dict
    L: dict
    S: dict
    T: dict
    CS: dict
    gain_margin: dict
    phase_margin: dict
    phase_crossover: dict
    gain_crossover: dict


@dataclass
class ColumnCurves:
    """Lazily computed curves of one revision over a few variants (nominal first)."""

    loop: str
    revision: str
    variants: tuple
    assembly: object
    output_unit: str = ""
    input_unit: str = ""
    #: time-grid settings of the step responses (:data:`DISPLAY_GRID` by default)
    grid: dict = field(default_factory=lambda: dict(DISPLAY_GRID))
    #: settings of the frequency grid (:data:`DISPLAY_FREQ_GRID` by default)
    freq_grid: dict = field(default_factory=lambda: dict(DISPLAY_FREQ_GRID))
    _steps: dict = field(default_factory=dict)
    _freq: FreqCurves | None = None
    _moves: dict = field(default_factory=dict)

    def _group_of(self, name: str):
        i = self.variants.index(name)
        for g in self.assembly.groups:
            hit = np.flatnonzero(np.asarray(g.index) == i)
            if hit.size:
                return g, int(hit[0])
        raise NotFoundError(f"variant {name!r} is not in the assembly")  # pragma: no cover

    def step(self, path: str = "r->y", amplitude: float = 1.0) -> StepCurves:
        """Step responses of ``path`` (``r->y``, ``r->e``, ``r->u``, ``d->y``)."""
        from .engine.timeresp import step_response

        key = (path, float(amplitude))
        if key not in self._steps:
            t, y, fin = {}, {}, {}
            for g in self.assembly.groups:
                sr = step_response(g.paths[path], amplitude=amplitude, **self.grid)
                for j, i in enumerate(np.asarray(g.index)):
                    name = self.variants[int(i)]
                    t[name], y[name], fin[name] = sr.t, sr.y[j], float(sr.final[j])
            self._steps[key] = StepCurves(t, y, fin, float(amplitude))
        return self._steps[key]

    def move(self, amplitude: float) -> dict:
        """The large move of amplitude ``amplitude`` (plant output units) per variant:
        ``name -> (t, y, saturated intervals, final)``
        (:func:`ledger.engine.movemetrics.move_responses`)."""
        from .engine.movemetrics import move_responses

        key = float(amplitude)
        if key not in self._moves:
            self._moves[key] = move_responses(self.assembly, key)
        return self._moves[key]

    def freq(self) -> FreqCurves:
        """Loop gain, S, T, CS and classical margins per variant."""
        from .engine.freqresp import frequency_grid
        from .engine.margins import margins

        if self._freq is None:
            out = {k: {} for k in ("w", "L", "S", "T", "CS", "gm", "pm", "wpc", "wgc")}
            for g in self.assembly.groups:
                w = frequency_grid(g.loop_gain, **self.freq_grid)
                w = w[w > 0]
                L = g.loop_gain.evaluate(w)
                S, T, CS = (g.closed[k].evaluate(w) for k in ("S", "T", "CS"))
                m = margins(g.loop_gain)
                for j, i in enumerate(np.asarray(g.index)):
                    n = self.variants[int(i)]
                    out["w"][n], out["L"][n], out["S"][n] = w, L[j], S[j]
                    out["T"][n], out["CS"][n] = T[j], CS[j]
                    out["gm"][n], out["pm"][n] = float(m.gain_margin[j]), float(m.phase_margin[j])
                    out["wpc"][n], out["wgc"][n] = (float(m.phase_crossover[j]),
                                                   float(m.gain_crossover[j]))
            self._freq = FreqCurves(out["w"], out["L"], out["S"], out["T"], out["CS"],
                                    out["gm"], out["pm"], out["wpc"], out["wgc"])
        return self._freq

    def poles(self) -> dict | None:
        """Closed-loop poles per variant (s-plane, 1/s; discrete ones mapped by ln z / Ts),
        or ``None`` when a loop delay makes them infinitely many."""
        out = {}
        dt = self.assembly.dt
        for g in self.assembly.groups:
            if g.poles is None:
                return None
            for j, i in enumerate(np.asarray(g.index)):
                p = np.asarray(g.poles[j], dtype=complex)
                if dt:
                    with np.errstate(divide="ignore"):
                        p = np.log(p[p != 0]) / dt
                out[self.variants[int(i)]] = p
        return out


def revision_curves(lg, loop: str, label: str, variants=(), *, include_nominal: bool = True,
                    grid: dict | None = None, freq_grid: dict | None = None) -> ColumnCurves:
    """Rebuild one revision's loop round the nominal variant (first in the family) and the
    variants named ``variants`` (in family order) for its curves.

    Parameters
    ----------
    lg : Ledger
    loop, label : str
        The revision.
    variants : iterable of str
        Variant names; unknown names are ignored.
    include_nominal : bool
        Include the nominal variant even when ``variants`` does not name it.
    grid, freq_grid : dict, optional
        Time- and frequency-grid settings (default :data:`DISPLAY_GRID`,
        :data:`DISPLAY_FREQ_GRID`; ``{}`` for the engine's own defaults).

    Raises
    ------
    NotFoundError
        None of ``variants`` is in the family.
    LedgerError
        The revision cannot be rebuilt (a model that no longer parses, an algebraic loop...).
    """
    from .engine.loop import assemble
    from .engine.types import PlantFamily

    fam, controller, loop_spec = lg.numeric_setup(loop, label)
    wanted = set(variants)
    # measured members have no model to rebuild a loop round: the curves show model members
    # (docs/measured.md); their values still enter the verdicts
    picked = [v for k, v in enumerate(fam.variants)
              if v.kind != "measured" and (v.name in wanted or (include_nominal and k == 0))]
    if not picked:
        raise NotFoundError(f"plant family of loop {loop!r} has no variant "
                            f"{sorted(wanted)[0] if wanted else 'nominal'!r}")
    asm = assemble(PlantFamily(tuple(picked)), controller, loop_spec)
    try:
        plant = lg.plant(lg.loop(loop).plant)
        units = (plant.output_unit or "", plant.input_unit or "")
    except LedgerError:
        units = ("", "")
    extra = {}
    if grid is not None:
        extra["grid"] = dict(grid)
    if freq_grid is not None:
        extra["freq_grid"] = dict(freq_grid)
    return ColumnCurves(loop=loop, revision=label, variants=tuple(v.name for v in picked),
                        assembly=asm, output_unit=units[0], input_unit=units[1], **extra)


def column_curves(lg, loop: str, label: str, worst: set[str] | None = None) -> ColumnCurves:
    """Rebuild one revision's loop round its nominal and named worst variants.

    Parameters
    ----------
    lg : Ledger
    loop, label : str
        The revision column.
    worst : set of str, optional
        Variant names to include besides the nominal (unknown names are ignored: the plant
        may have a newer version than a stale result).

    Raises
    ------
    LedgerError
        The revision cannot be rebuilt (a model that no longer parses, an algebraic loop...).
    """
    return revision_curves(lg, loop, label, worst or ())
