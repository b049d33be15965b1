"""Requirement limits with units: parsing ``"<= 25 ms"``, conversion to a metric's unit.

Each metric has one canonical unit (see ``docs/metrics.md``): ``s``, ``%``, ``dB``, ``deg``,
``rad/s``, ``1/s``, ``ratio`` or ``""`` (a plain number in signal units) or ``bool``.  A limit
may be typed in any unit of the same kind; pint does the dimensional conversions.  Two
conversions pint cannot know are done here, by the trade's convention:

* ``Hz`` to ``rad/s`` multiplies by 2 pi (pint treats the radian as dimensionless and would
  convert 1 Hz to 1 rad/s);
* ``dB`` to a plain magnitude ratio is 10^(x/20), and a ratio to dB is 20 log10(x).

Units carried from the plant
----------------------------
A plant may declare the unit of its input (e.g. ``A``, ``V``) and of its output (e.g. ``rad``,
``mm``).  The metrics that are signals of the loop then carry those units
(:data:`PLANT_UNIT_METRICS`): the peak control effort is in the input unit, the disturbance peak
and the steady-state, ramp and parabola errors in the output unit, the peak of |C S| in input
unit per output unit.  :func:`resolve_unit` gives a metric's unit for a plant.  A limit on such a
metric may be written in any compatible unit (``<= 20 mrad`` for a plant in ``rad``,
``<= 2500 mA`` for one in ``A``); a bare number is read in the plant's own unit.  A plant that
declares no units keeps these metrics dimensionless: a bare number or a dimensionless unit
(``%``, and ``dB`` for ratios).

pint treats the radian as dimensionless.  Angles are kept apart here: a limit in ``mrad`` does not
fit a metric in ``mm`` or a dimensionless one, and ``%`` does not fit one in ``rad``.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from functools import lru_cache

from .errors import UnitError

__all__ = ["Limit", "parse_limit", "convert", "COMPARATORS", "format_value", "PLANT_UNIT_METRICS",
           "resolve_unit", "check_plant_unit", "unit_origin"]

COMPARATORS = ("<=", "<", ">=", ">", "==")
_COMPARATOR_ALIASES = {"≤": "<=", "≥": ">=", "=": "==", "=<": "<=", "=>": ">="}

_LIMIT_RE = re.compile(
    r"^\s*(?P<cmp><=|>=|==|=<|=>|<|>|=|≤|≥)\s*"
    r"(?P<num>[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(?P<unit>.*?)\s*$"
)
_BOOL_RE = re.compile(r"^\s*(?:==\s*)?(?P<b>true|false|yes|no)\s*$", re.IGNORECASE)

# what a user may type for each canonical unit (besides the pint conversions)
_PERCENT = {"%", "percent", "pct"}
_DB = {"db", "dB"}
_RATIO = {"", "ratio", "x", "abs"}


@dataclass(frozen=True)
class Limit:
    """A comparator and a limit value in the metric's canonical unit.

    Attributes
    ----------
    comparator : str
        One of ``<=``, ``<``, ``>=``, ``>``, ``==``.
    value : float
        The limit converted to ``unit``.
    unit : str
        The metric's canonical unit.
    text : str
        What the user typed, e.g. ``"<= 25 ms"``.
    """

    comparator: str
    value: float
    unit: str
    text: str


def _parse_errors() -> tuple:
    """What pint raises on unit text it cannot parse (its tokenizer raises TokenError on
    unbalanced brackets, its parser AssertionError on a dangling operator)."""
    import tokenize

    import pint

    return (pint.errors.UndefinedUnitError, pint.errors.DefinitionSyntaxError, AttributeError,
            AssertionError, TypeError, ValueError, IndexError, KeyError, SyntaxError,
            tokenize.TokenError)


@lru_cache(maxsize=1)
def _ureg():
    import pint

    return pint.UnitRegistry()


def _pint_convert(value: float, unit_text: str, target: str, metric_unit: str) -> float:
    import pint

    ureg = _ureg()
    try:
        q = ureg.Quantity(value, unit_text)
    except _parse_errors() as e:
        raise UnitError(f"unknown unit {unit_text!r}") from e
    try:
        return float(q.to(target).magnitude)
    except pint.errors.DimensionalityError as e:
        raise UnitError(
            f"unit {unit_text!r} does not fit a metric measured in {metric_unit}"
        ) from e
    except (ArithmeticError, TypeError, ValueError) as e:
        raise UnitError(f"unit {unit_text!r} cannot be converted to {target}") from e


#: Metrics whose unit comes from the plant: ``in`` (plant input), ``out`` (plant output) or
#: ``in/out``.  Every other metric has the fixed unit of the catalogue.
PLANT_UNIT_METRICS = {
    "peak_effort": "in",
    "disturbance_peak": "out",
    "steady_state_error": "out",
    "ramp_error": "out",
    "parabola_error": "out",
    "peak_control_sensitivity": "in/out",
    "rms_error": "out",
    "rms_effort": "in",
    "disturbance_offset": "out",
    "move_peak_rate": "out/s",
}


def check_plant_unit(text: str, what: str = "unit") -> str:
    """Check a plant's declared unit (``""`` = none); return it stripped.

    Raises
    ------
    UnitError
        pint does not know the unit, or it carries an offset (e.g. degC).
    """
    import pint

    from .text import check_line

    u = check_line(what, (text or "").strip())  # the one text rule first (ledger/text.py)
    if not u:
        return ""
    try:
        q = _ureg().Quantity(1.0, u)
    except _parse_errors() as e:
        raise UnitError(f"{what} {u!r} is not a unit pint knows; write e.g. 'A', 'V', 'rad', "
                        "'mm' or 'N*m'") from e
    if not q._is_multiplicative:
        raise UnitError(f"{what} {u!r} has an offset; use an absolute unit (e.g. K)")
    return u


def resolve_unit(metric: str, catalogue_unit: str, input_unit: str = "",
                 output_unit: str = "") -> str:
    """A metric's unit for a plant with the given declared units.

    Examples
    --------
    >>> resolve_unit("peak_effort", "", "A", "rad")
    'A'
    >>> resolve_unit("peak_control_sensitivity", "ratio", "A", "rad")
    'A/rad'
    >>> resolve_unit("peak_effort", "", "", "")
    ''
    """
    kind = PLANT_UNIT_METRICS.get(metric)
    iu, ou = (input_unit or "").strip(), (output_unit or "").strip()
    if kind == "in":
        return iu or catalogue_unit
    if kind == "out":
        return ou or catalogue_unit
    if kind == "in/out":
        if not iu and not ou:
            return catalogue_unit
        return f"{iu or '1'}/{ou}" if ou else iu
    if kind == "out/s":
        return f"{ou}/s" if ou else catalogue_unit
    return catalogue_unit


def quantity_in(text, output_unit: str, what: str = "move") -> float:
    """A setting written as a number or ``"10 mm"`` read in a plant's unit ``output_unit``.

    A bare number is in the plant's own unit; a unit needs the plant to declare one that it
    converts to (angles stay apart, as for limits).

    Raises
    ------
    UnitError
        The text does not parse, the unit is unknown or does not fit ``output_unit``.
    """
    if not isinstance(text, str):
        return float(text)
    parts = text.strip().split(None, 1)
    try:
        value = float(parts[0])
    except (ValueError, IndexError) as e:
        raise UnitError(f"{what} {text!r} is not a number with an optional unit") from e
    if len(parts) == 1:
        return value
    unit = parts[1].strip()
    ou = (output_unit or "").strip()
    if not ou:
        raise UnitError(f"{what} {text!r} has a unit but the plant declares no output unit; "
                        "give a plain number or declare the plant's units")
    try:
        return _convert_signal(value, unit, ou)
    except UnitError as e:
        raise UnitError(f"{what} {text!r}: {e}") from e


def unit_origin(metric: str) -> str:
    """Words naming where a metric's unit comes from, for messages (``""`` if fixed)."""
    return {"in": "the plant's input unit", "out": "the plant's output unit",
            "in/out": "plant input unit per output unit",
            "out/s": "the plant's output unit per second"}.get(PLANT_UNIT_METRICS.get(metric, ""), "")


def _angle_power(unit_text: str) -> int:
    """Power of the radian in a unit (pint counts the radian as dimensionless)."""
    q = _ureg().Quantity(1.0, unit_text).to_root_units()
    return int(round(dict(q.unit_items()).get("radian", 0)))


def _convert_signal(value: float, u: str, metric_unit: str) -> float:
    """A limit on a metric in a plant-declared unit (any pint unit)."""
    import pint

    if not u:
        return value  # a bare number is in the plant's own unit (documented)
    if u in _DB or u in _PERCENT and _angle_power(metric_unit) != 0:
        raise UnitError(f"unit {u!r} does not fit a metric measured in {metric_unit}")
    if u in _PERCENT:
        u = "percent"
    try:
        q = _ureg().Quantity(value, u)
    except _parse_errors() as e:
        raise UnitError(f"unknown unit {u!r}") from e
    try:
        if _angle_power(u) != _angle_power(metric_unit):
            raise pint.errors.DimensionalityError(u, metric_unit)
        return float(q.to(metric_unit).magnitude)
    except pint.errors.DimensionalityError as e:
        raise UnitError(f"unit {u!r} does not fit a metric measured in {metric_unit}") from e
    except _parse_errors() as e:
        # a plant unit recorded before units were checked, unknown to pint: only a bare
        # number (in that unit) can be compared with it
        raise UnitError(f"unit {u!r} cannot be converted to {metric_unit!r}, which pint does "
                        "not know; write the limit as a plain number in that unit") from e


def convert(value: float, unit_text: str, metric_unit: str) -> float:
    """Convert ``value unit_text`` to ``metric_unit``; raise UnitError if it does not fit."""
    u = unit_text.strip()
    if not math.isfinite(value) and u in _RATIO | _DB | _PERCENT:
        return value
    if metric_unit == "s":
        if not u:
            raise UnitError("a time limit needs a unit, e.g. '25 ms' or '0.15 s'")
        return _pint_convert(value, u, "s", metric_unit)
    if metric_unit == "deg":
        if not u:
            raise UnitError("an angle limit needs a unit, e.g. '45 deg'")
        u = {"°": "deg", "degree": "deg", "degrees": "deg"}.get(u, u)
        return _pint_convert(value, u, "deg", metric_unit)
    if metric_unit in ("rad/s", "1/s"):
        if not u:
            raise UnitError(f"a frequency limit needs a unit, e.g. '30 Hz' or '190 {metric_unit}'")
        low = u.replace(" ", "")
        if low in ("Hz", "kHz", "MHz", "mHz"):
            hz = _pint_convert(value, low, "Hz", metric_unit)
            return 2.0 * math.pi * hz if metric_unit == "rad/s" else hz
        if metric_unit == "1/s" and low in ("1/s", "s^-1", "/s"):
            return value
        if low in ("rad/s", "rad/sec", "1/s", "s^-1", "/s"):
            return value
        return _pint_convert(value, u, "rad/s", metric_unit)
    if metric_unit == "%":
        if u in _PERCENT:
            return value
        raise UnitError(f"unit {unit_text!r} does not fit a metric in percent; write e.g. '12 %'")
    if metric_unit == "dB":
        if u in _DB:
            return value
        if u in ("ratio", "x", "abs"):
            if value <= 0:
                raise UnitError("a magnitude ratio must be positive")
            return 20.0 * math.log10(value)
        raise UnitError(
            f"unit {unit_text!r} does not fit a metric in dB; write e.g. '6 dB' or '2 ratio'"
        )
    if metric_unit == "ratio":
        if u in _RATIO:
            return value
        if u in _DB:
            return 10.0 ** (value / 20.0)
        if u in _PERCENT:
            return value / 100.0
        raise UnitError(f"unit {unit_text!r} does not fit a magnitude ratio; write e.g. '2' or '6 dB'")
    if metric_unit == "bool":
        if u in ("",):
            return value
        raise UnitError(f"unit {unit_text!r} does not fit a metric without unit")
    if metric_unit == "":
        if u in ("",):
            return value
        if u in _PERCENT:
            return value / 100.0
        raise UnitError(f"unit {unit_text!r} does not fit a metric without unit (the plant "
                        "declares no units; give its input and output units to use them)")
    if metric_unit not in ("1/s^2",):
        return _convert_signal(value, u, metric_unit)
    if not u:
        raise UnitError(f"a limit on a metric in {metric_unit} needs a unit")
    return _pint_convert(value, u, metric_unit, metric_unit)


def parse_limit(text: str, metric_unit: str, *, signal: bool = False) -> Limit:
    """Parse a limit such as ``"<= 25 ms"`` for a metric measured in ``metric_unit``.

    Examples
    --------
    >>> parse_limit(">= 45 deg", "deg").value
    45.0
    >>> round(parse_limit("<= 30 Hz", "rad/s").value, 4)
    188.4956
    """
    if not isinstance(text, str) or not text.strip():
        raise UnitError("a limit is needed, e.g. '<= 25 ms' or '>= 6 dB'")
    if metric_unit == "bool":
        m = _BOOL_RE.match(text)
        if not m:
            raise UnitError(f"limit {text!r}: this metric is true or false; write 'true'")
        return Limit("==", 1.0 if m["b"].lower() in ("true", "yes") else 0.0, "bool", text.strip())
    m = _LIMIT_RE.match(text)
    if not m:
        raise UnitError(
            f"limit {text!r} not understood; write a comparator, a number and a unit, e.g. '<= 25 ms'"
        )
    cmp_ = _COMPARATOR_ALIASES.get(m["cmp"], m["cmp"])
    raw = float(m["num"])
    if not math.isfinite(raw):
        raise UnitError(f"limit {text!r} is not a finite number")
    if signal:  # a unit declared by the plant (may read like a catalogue unit, e.g. rad/s)
        value = _convert_signal(raw, m["unit"].strip(), metric_unit)
    else:
        value = convert(raw, m["unit"], metric_unit)
    if not math.isfinite(value):
        raise UnitError(f"limit {text!r} overflows in {metric_unit}; give a smaller number")
    if math.isnan(value):
        raise UnitError(f"limit {text!r} is not a number")
    return Limit(cmp_, value, metric_unit, text.strip())


def format_value(value: float | None, unit: str, digits: int = 4) -> str:
    """Human-readable value with unit, e.g. ``0.0234 s`` -> ``23.4 ms``."""
    if value is None:
        return "-"
    if isinstance(value, float) and math.isinf(value):
        return ("inf" if value > 0 else "-inf") + (f" {unit}" if unit and unit not in ("ratio", "bool") else "")
    if unit == "bool":
        return "yes" if value else "no"
    if unit == "s":
        a = abs(value)
        if a != 0 and a < 1e-3:
            return f"{value * 1e6:.{digits}g} us"
        if a != 0 and a < 1.0:
            return f"{value * 1e3:.{digits}g} ms"
        return f"{value:.{digits}g} s"
    if unit in ("ratio", ""):
        return f"{value:.{digits}g}"
    return f"{value:.{digits}g} {unit}"


def limit_unit_text(text: str) -> str:
    """The unit part of a limit as written (``"<= 25 ms"`` -> ``"ms"``; ``""`` if none)."""
    m = _LIMIT_RE.match(text or "")
    return m["unit"].strip() if m else ""


def parse_limit_for(text: str, metric: str, catalogue_unit: str,
                    plants: list[tuple[str, str, str]] = ()) -> Limit:
    """Parse a requirement's limit against every loop it applies to.

    Parameters
    ----------
    text : str
        The limit as written, e.g. ``"<= 3 A"``.
    metric, catalogue_unit : str
        The metric's name and its unit in the catalogue.
    plants : list of (loop name, plant input unit, plant output unit)
        The loops the requirement applies to, with their plants' declared units.

    Returns
    -------
    Limit
        In the first loop's unit for the metric (the catalogue unit without loops; a limit on
        a plant-unit metric written in a unit is then kept in that unit's SI coherent unit and
        read again against each plant when verified).

    Raises
    ------
    UnitError
        The limit does not parse, or its unit does not fit the metric on one of the loops;
        the message names both units.
    """
    first = None
    for loop, iu, ou in plants:
        unit = resolve_unit(metric, catalogue_unit, iu, ou)
        try:
            lim = parse_limit(text, unit, signal=unit != catalogue_unit)
        except UnitError as e:
            written = limit_unit_text(text)
            if "does not fit" in str(e):
                where = unit_origin(metric) if unit != catalogue_unit else ""
                raise UnitError(
                    f"limit {text!r}: unit {written or '(none)'!s} does not fit {metric} on loop "
                    f"{loop!r}, measured in "
                    + (unit or "no unit (the plant declares no units; give its input and output "
                               "units, or write a plain number)")
                    + (f" ({where})" if where else "")) from e
            raise
        first = first or lim
    if first is not None:
        return first
    if metric in PLANT_UNIT_METRICS and limit_unit_text(text) and \
            limit_unit_text(text) not in _PERCENT | _DB:
        written = limit_unit_text(text)
        check_plant_unit(written, "limit unit")
        base = str(_ureg().Quantity(1.0, written).to_base_units().units)
        lim = parse_limit(text, base, signal=True)
        return Limit(lim.comparator, lim.value, base, lim.text)
    return parse_limit(text, catalogue_unit)
