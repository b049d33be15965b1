"""The metric catalogue: every metric the engine can measure, by its contract name.

Names, units and the direction of "better" are a contract that requirement records and user
scripts rely on; see ``docs/metrics.md`` for formulas and references.  This module holds data
only (no numerics) so listings stay cheap.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from types import MappingProxyType

from ..errors import SpecError, UnknownMetricError

__all__ = ["MetricDef", "METRICS", "STANDARD_SUITE", "get_metric", "metric_names",
           "resolve_settings", "SETTING_DOCS", "OPTIONAL_SETTINGS"]

_STEP = (("amplitude", 1.0), ("settling_band", 0.02), ("settling_basis", "final"),
         ("rise_limits", (0.1, 0.9)))
#: rise, settling and overshoot of a digital loop may be read on the continuous output
#: (docs/digital.md); the default is left out of resolved settings so that values recorded
#: before the setting existed keep their keys
_TIMED = _STEP + (("time_basis", "samples"),)
_MOVE = (("move", None), ("settling_band", 0.02), ("settling_basis", "final"))

#: Every metric setting with its meaning and unit.
SETTING_DOCS = MappingProxyType({
    "amplitude": "step amplitude (input units; for ramp/parabola errors the slope / curvature)",
    "settling_band": "settling band as a fraction of the basis, dimensionless",
    "settling_basis": "what the settling band is a fraction of: 'final' (|final value|) or 'step' "
                      "(|step amplitude|)",
    "rise_limits": "rise-time limits as fractions of the final value (low, high)",
    "frequency": "frequency bound in rad/s",
    "band": "recovery band as a fraction of the disturbance peak |y|, dimensionless",
    "time_basis": "digital loops: 'samples' (read at the sample instants, the default) or "
                  "'continuous' (the plant output between samples)",
    "source": "which recorded spectrum drives an rms metric: 'all' (independent sources, "
              "powers add), 'sensor_noise', 'input_disturbance' or 'output_disturbance'",
    "error": "which error rms_error reads: 'output' (the output about its set point, the "
             "tracking error for a reference at rest) or 'measured' (the actuating error "
             "the controller sees, sensor noise included)",
    "sigmas": "multiple of the rms value reported (1: rms, 3: the 3-sigma value), "
              "dimensionless",
    "recovery_to": "what disturbance_recovery settles to: 'final' (the final value, default) or "
                   "'zero' (the output back at zero; a permanent offset larger than the band "
                   "never recovers)",
    "move": "amplitude of the large move (reference step), plant output units; a number or "
            "text with a unit, e.g. '10 mm'",
})

#: Settings whose default is left out of the complete settings when not given, so that adding
#: them kept every earlier requirement's metric key (and cached value) as it was.
OPTIONAL_SETTINGS = MappingProxyType({("disturbance_recovery", "recovery_to"): "final"})


#: Settings of the rms metrics that take one of a few words.
_RMS_CHOICES = {"source": ("all", "sensor_noise", "input_disturbance", "output_disturbance"),
                "error": ("output", "measured")}


@dataclass(frozen=True)
class MetricDef:
    """Definition of one metric.

    Attributes
    ----------
    name : str
        Contract name, e.g. ``"phase_margin"``.
    unit : str
        ``s``, ``%``, ``dB``, ``deg``, ``rad/s``, ``ratio``, ``1/s``, ``""`` or ``"bool"``.
    better : str
        ``"higher"`` or ``"lower"``; the worst value over a family is the min or the max.
    needs_stable : bool
        The metric only exists for a stable closed loop.
    path : str
        Signal path or loop function it reads: ``r->y``, ``r->e``, ``r->u``, ``d->y``,
        ``L``, ``S``, ``T``, ``CS``, ``poles``, ``move`` (r->y of the loop with its actuator
        limits, simulated).
    settings : tuple of (str, default)
        Settings this metric accepts, with defaults (``None``: must be given).
    doc : str
        One-line definition.
    """

    name: str
    unit: str
    better: str
    needs_stable: bool
    path: str
    settings: tuple = ()
    doc: str = ""

    @property
    def defaults(self) -> dict:
        """Settings with their defaults, as a new dict (``time_basis`` at its default
        ``"samples"`` is left out, as in resolved settings; :attr:`accepts` names it)."""
        d = dict(self.settings)
        if d.get("time_basis") == "samples":
            del d["time_basis"]
        return d

    @property
    def accepts(self) -> frozenset:
        """Names of every setting the metric takes."""
        return frozenset(k for k, _ in self.settings)

    def worst_sign(self) -> float:
        """+1 when larger values are worse (``better == 'lower'``), else -1."""
        return 1.0 if self.better == "lower" else -1.0


def _m(name, unit, better, needs_stable, path, settings=(), doc=""):
    return MetricDef(name, unit, better, needs_stable, path, tuple(settings), doc)


_DEFS = [
    _m("stable", "bool", "higher", False, "poles", (),
       "1 when every closed-loop pole is stable (internal stability), else 0"),
    _m("rise_time", "s", "lower", True, "r->y", _TIMED,
       "time from rise_limits[0] to rise_limits[1] of the final value, step on r"),
    _m("settling_time", "s", "lower", True, "r->y", _TIMED,
       "last time |y - y_final| exceeds settling_band x |y_final|"),
    _m("overshoot", "%", "lower", True, "r->y", _TIMED,
       "100 (y_max - y_final) / |y_final|, 0 if y never exceeds y_final"),
    _m("undershoot", "%", "lower", True, "r->y", _STEP,
       "initial wrong-way excursion, 100 max(-y sign(y_final)) / |y_final|"),
    _m("peak_time", "s", "lower", True, "r->y", _STEP,
       "time of the largest y when y exceeds y_final; inf without overshoot (the final "
       "value is only approached as t -> inf)"),
    _m("steady_state_error", "", "lower", True, "r->e", (("amplitude", 1.0),),
       "|final actuating error| for a step of r: amplitude F(0) / (1 + Kp)"),
    _m("ramp_error", "", "lower", True, "r->e", (("amplitude", 1.0),),
       "|final actuating error| for a ramp of slope amplitude: amplitude F(0) / Kv"),
    _m("parabola_error", "", "lower", True, "r->e", (("amplitude", 1.0),),
       "|final actuating error| for r = amplitude t^2 / 2: amplitude F(0) / Ka"),
    _m("position_constant", "", "higher", False, "L", (), "Kp = lim_{s->0} L(s)"),
    _m("velocity_constant", "1/s", "higher", False, "L", (), "Kv = lim_{s->0} s L(s)"),
    _m("acceleration_constant", "1/s^2", "higher", False, "L", (),
       "Ka = lim_{s->0} s^2 L(s)"),
    _m("system_type", "", "higher", False, "L", (), "number of integrators of L at s = 0"),
    _m("peak_effort", "", "lower", True, "r->u", (("amplitude", 1.0),),
       "sup |u(t)| for a step on r, the jump at t = 0+ included (plant-input units)"),
    _m("disturbance_peak", "", "lower", True, "d->y", (("amplitude", 1.0),),
       "sup |y(t)| for a step disturbance at the plant input"),
    _m("disturbance_recovery", "s", "lower", True, "d->y",
       (("amplitude", 1.0), ("band", 0.02), ("recovery_to", "final")),
       "last time |y - y_final| exceeds band x peak |y| after a step input disturbance"),
    _m("gain_margin", "dB", "higher", False, "L", (),
       "smallest positive -20 log10|L| at a phase crossover (inf if none)"),
    _m("gain_margin_lower", "dB", "lower", False, "L", (),
       "largest negative -20 log10|L| at a phase crossover (-inf if none)"),
    _m("phase_margin", "deg", "higher", False, "L", (),
       "min over gain crossovers of 180 + arg L, wrapped to (-180, 180] (inf if none)"),
    _m("delay_margin", "s", "higher", False, "L", (),
       "min over every gain crossover w > 0 of ((180 + arg L) mod 360)[rad] / w: the extra "
       "loop delay that first destabilises the loop (inf if no crossover, 0 if unstable)"),
    _m("gain_crossover", "rad/s", "higher", False, "L", (),
       "frequency of the crossover that sets the phase margin (inf if none)"),
    _m("phase_crossover", "rad/s", "higher", False, "L", (),
       "frequency of the crossover that sets the upper gain margin (inf if none)"),
    _m("bandwidth", "rad/s", "higher", True, "T", (),
       "first w where |T(jw)| = 10^(-3/20) |T(0)|"),
    _m("peak_sensitivity", "ratio", "lower", True, "S", (), "Ms = max_w |S(jw)|"),
    _m("peak_complementary_sensitivity", "ratio", "lower", True, "T", (),
       "Mt = max_w |T(jw)|"),
    _m("peak_control_sensitivity", "ratio", "lower", True, "CS", (), "max_w |C S (jw)|"),
    _m("sensitivity_below", "ratio", "lower", True, "S", (("frequency", None),),
       "max |S(jw)| for w <= frequency"),
    _m("complementary_sensitivity_above", "ratio", "lower", True, "T",
       (("frequency", None),), "max |T(jw)| for w >= frequency"),
    _m("disk_margin", "", "higher", True, "L", (),
       "balanced disk margin alpha = 2 / max_w |S(jw) - T(jw)| (Seiler et al. 2020)"),
    _m("disk_gain_margin", "dB", "higher", True, "L", (),
       "gain interval guaranteed by the disk margin, upper end 20 log10((2+a)/(2-a))"),
    _m("disk_phase_margin", "deg", "higher", True, "L", (),
       "phase interval guaranteed by the disk margin, 2 atan(a/2) in degrees"),
    _m("min_damping", "", "higher", False, "poles", (),
       "min over closed-loop poles of -Re(s)/|s| (1 for real poles)"),
    _m("decay_rate", "1/s", "higher", False, "poles", (),
       "min over closed-loop poles of -Re(s) (discrete: s = ln z / Ts; with a delay: the "
       "rightmost root of the delay equation's characteristic equation)"),
    _m("quantization_pole_shift", "", "lower", False, "poles", (),
       "digital loops: largest distance in the z plane between the closed-loop poles with "
       "the coefficients as stored (number format) and with the unquantised controller, "
       "poles matched one to one; 0 without a number format"),
    _m("intersample_ripple", "%", "lower", True, "r->y",
       (("amplitude", 1.0), ("settling_band", 0.02)),
       "digital loops: after settling on the samples, the largest distance between the "
       "continuous plant output and the line through its neighbouring sample values, "
       "100 x / |y_final| (step on r)"),
    # measured plants (docs/measured.md)
    _m("model_fit", "dB", "lower", False, "G", (("frequency", None),),
       "on a measured member: max over its kept points w <= frequency of "
       "|20 log10 |G_meas / G_nominal||, the design model's delay included; 0 on model members"),
    _m("model_fit_phase", "deg", "lower", False, "G", (("frequency", None),),
       "on a measured member: max over its kept points w <= frequency of "
       "|arg(G_meas / G_nominal)| wrapped to [0, 180]; 0 on model members"),
    # rms budgets from the loop's recorded spectra (ledger/engine/rms.py)
    _m("rms_error", "", "lower", True, "spectra->y",
       (("source", "all"), ("error", "output"), ("sigmas", 1.0)),
       "sigmas x rms of the output (or measured error) driven by the loop's noise and "
       "disturbance spectra, sources independent (plant-output units)"),
    _m("rms_effort", "", "lower", True, "spectra->u", (("source", "all"), ("sigmas", 1.0)),
       "sigmas x rms of the control effort u driven by the loop's noise and disturbance "
       "spectra, sources independent (plant-input units)"),
    # issue 16: disturbance offset and the large-move response
    _m("disturbance_offset", "", "lower", True, "d->y", (("amplitude", 1.0),),
       "|y(inf)| for a step disturbance at the plant input: amplitude |G(0) / (1 + L(0))| by "
       "the final-value theorem (0 with an integrator in the controller)"),
    _m("move_settling_time", "s", "lower", True, "move", _MOVE,
       "settling_time of the large-move response (actuator limit, rate limit, anti-windup)"),
    _m("move_overshoot", "%", "lower", True, "move", _MOVE,
       "overshoot of the large-move response, 100 (y_max - y_final) / |y_final|"),
    _m("move_time_saturated", "s", "lower", True, "move", _MOVE,
       "total time the actuator is at its limit (or slewing at its rate limit) during the move"),
    _m("move_peak_rate", "", "lower", True, "move", _MOVE,
       "sup |dy/dt| of the large-move response, plant output units per second"),
]

#: name -> MetricDef, in catalogue order.
METRICS = MappingProxyType({d.name: d for d in _DEFS})

#: The metrics measured when no names are given.
STANDARD_SUITE = ("stable", "rise_time", "settling_time", "overshoot", "steady_state_error",
                  "gain_margin", "phase_margin", "delay_margin", "peak_sensitivity",
                  "peak_complementary_sensitivity", "bandwidth", "disk_margin",
                  "min_damping")


def metric_names() -> tuple:
    """All metric names in catalogue order."""
    return tuple(METRICS)


def get_metric(name: str) -> MetricDef:
    """Look a metric up by name.

    Raises
    ------
    UnknownMetricError
        Unknown name (a :class:`~ledger.errors.SpecError` and an
        :class:`~ledger.errors.IntegrityViolation`); the message lists the valid ones.
    """
    try:
        return METRICS[name]
    except (KeyError, TypeError) as e:
        raise UnknownMetricError(f"unknown metric {name!r}; valid metrics: "
                                 f"{', '.join(METRICS)}") from e


def resolve_settings(name: str, settings: dict | None = None) -> dict:
    """Merge ``settings`` over a metric's defaults and check them.

    Parameters
    ----------
    name : str
        Metric name.
    settings : dict, optional
        Only keys the metric accepts.

    Returns
    -------
    dict
        Complete settings (floats as floats, rise limits as a tuple).

    Raises
    ------
    SpecError
        Unknown setting, a required setting missing, or a value out of range.
    """
    mdef = get_metric(name)
    out = mdef.defaults
    given = set(settings or {})
    for key, value in (settings or {}).items():
        if key not in mdef.accepts:
            valid = ", ".join(dict(mdef.settings)) or "none"
            raise SpecError(f"metric {name!r} takes no setting {key!r}; valid: {valid}")
        out[key] = value
    for key, value in out.items():
        if value is None:
            raise SpecError(f"metric {name!r} needs the setting {key!r} ({SETTING_DOCS[key]})")
        if key in ("amplitude", "settling_band", "frequency", "band"):
            try:
                x = float(value)
            except (TypeError, ValueError) as e:
                raise SpecError(f"setting {key!r} of {name!r} must be a number, "
                                f"got {value!r}") from e
            if not math.isfinite(x) or (key != "amplitude" and x <= 0) or x == 0:
                raise SpecError(f"setting {key!r} of {name!r} is {value!r}; give a finite "
                                "non-zero value (positive for bands and frequencies)")
            if key in ("settling_band", "band") and x >= 1:
                raise SpecError(f"setting {key!r} of {name!r} is {value!r}; give a fraction "
                                "below 1, e.g. 0.02")
            out[key] = x
        elif key == "rise_limits":
            try:
                lo, hi = (float(v) for v in value)
            except (TypeError, ValueError) as e:
                raise SpecError(f"rise_limits of {name!r} must be two fractions (low, high), "
                                f"got {value!r}") from e
            if not 0.0 <= lo < hi <= 1.0:
                raise SpecError(f"rise_limits {value!r} must satisfy 0 <= low < high <= 1")
            out[key] = (lo, hi)
        elif key == "settling_basis":
            if value not in ("final", "step"):
                raise SpecError(f"settling_basis {value!r} is unknown; use 'final' or 'step'")
        elif key == "time_basis":
            if value not in ("samples", "continuous"):
                raise SpecError(f"time_basis {value!r} is unknown; use 'samples' or "
                                "'continuous'")
        elif key in _RMS_CHOICES:
            if value not in _RMS_CHOICES[key]:
                raise SpecError(f"setting {key!r} of {name!r} is {value!r}; use one of "
                                f"{', '.join(_RMS_CHOICES[key])}")
        elif key == "sigmas":
            try:
                x = float(value)
            except (TypeError, ValueError) as e:
                raise SpecError(f"setting 'sigmas' of {name!r} must be a number, "
                                f"got {value!r}") from e
            if not (math.isfinite(x) and x > 0):
                raise SpecError(f"setting 'sigmas' of {name!r} is {value!r}; give a positive "
                                "multiple, e.g. 3 for the 3-sigma value")
            out[key] = x
        elif key == "recovery_to":
            if value not in ("final", "zero"):
                raise SpecError(f"recovery_to {value!r} is unknown; use 'final' or 'zero'")
        elif key == "move":
            out[key] = _move_value(name, value)
    if out.get("time_basis") == "samples":
        del out["time_basis"]   # the default: absent, as before the setting existed
    for key in [k for k in out if (name, k) in OPTIONAL_SETTINGS]:
        if key not in given and out[key] == OPTIONAL_SETTINGS[(name, key)]:
            del out[key]
    return out


def _move_value(name: str, value):
    """A move amplitude: a non-zero finite number (plant output units), or text ``"10 mm"``
    (kept as text; the verification reads it in the plant's output unit)."""
    if isinstance(value, str):
        parts = value.strip().split(None, 1)
        try:
            x = float(parts[0]) if parts else float("nan")
        except ValueError as e:
            raise SpecError(f"setting 'move' of {name!r} is {value!r}; give a number with an "
                            "optional unit, e.g. '10 mm'") from e
        if not math.isfinite(x) or x == 0:
            raise SpecError(f"setting 'move' of {name!r} is {value!r}; give a finite non-zero "
                            "amplitude")
        return value.strip() if len(parts) > 1 else x
    if isinstance(value, bool):
        raise SpecError(f"setting 'move' of {name!r} must be a number, got {value!r}")
    try:
        x = float(value)
    except (TypeError, ValueError) as e:
        raise SpecError(f"setting 'move' of {name!r} must be a number, got {value!r}") from e
    if not math.isfinite(x) or x == 0:
        raise SpecError(f"setting 'move' of {name!r} is {value!r}; give a finite non-zero "
                        "amplitude")
    return x
