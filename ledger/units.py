"""Requirement limits with units: parsing ``"<= 25 ms"``, conversion to a metric's unit.

Each metric has one canonical unit (see ``docs/metrics.md``): ``s``, ``%``, ``dB``, ``deg``,
``rad/s``, ``1/s``, ``ratio`` or ``""`` (a plain number in signal units) or ``bool``.  A limit
may be typed in any unit of the same kind; pint does the dimensional conversions.  Two
conversions pint cannot know are done here, by the trade's convention:

* ``Hz`` to ``rad/s`` multiplies by 2 pi (pint treats the radian as dimensionless and would
  convert 1 Hz to 1 rad/s);
* ``dB`` to a plain magnitude ratio is 10^(x/20), and a ratio to dB is 20 log10(x).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from functools import lru_cache

from .errors import UnitError

__all__ = ["Limit", "parse_limit", "convert", "COMPARATORS", "format_value"]

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


@lru_cache(maxsize=1)
def _ureg():
    import pint

    return pint.UnitRegistry()


def _pint_convert(value: float, unit_text: str, target: str, metric_unit: str) -> float:
    import pint

    ureg = _ureg()
    try:
        q = ureg.Quantity(value, unit_text)
    except Exception as e:  # noqa: BLE001 - pint's parser raises many kinds on odd text
        # (an unbalanced ')' gives tokenize.TokenError, '1/0' ZeroDivisionError...): all of
        # them mean the text is not a unit
        raise UnitError(f"unknown unit {unit_text!r}") from e
    try:
        return float(q.to(target).magnitude)
    except pint.errors.DimensionalityError as e:
        raise UnitError(
            f"unit {unit_text!r} does not fit a metric measured in {metric_unit}"
        ) from e
    except (ArithmeticError, TypeError, ValueError) as e:
        raise UnitError(f"unit {unit_text!r} cannot be converted to {target}") from e


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
        raise UnitError(f"unit {unit_text!r} does not fit a magnitude ratio; write e.g. '2' or '6 dB'")
    if metric_unit in ("", "bool"):
        if u in ("",):
            return value
        raise UnitError(f"unit {unit_text!r} does not fit a metric without unit")
    if not u:
        raise UnitError(f"a limit on a metric in {metric_unit} needs a unit")
    return _pint_convert(value, u, metric_unit, metric_unit)


def parse_limit(text: str, metric_unit: str) -> Limit:
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
