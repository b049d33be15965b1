"""How a value is shown next to its limit: in the limit's unit, with a set number of digits.

Every view (CLI tables, diff, trace, terminal UI, exports, JUnit messages, sign-off documents)
formats values through this module, so one result reads the same everywhere.  The rules are in
``docs/metrics.md`` ("Values shown in the limit's unit", "Headroom per unit kind"):

* a value is converted from the metric's unit to the unit the limit is written in
  (``0.1451 s`` beside ``<= 200 ms`` reads ``145.1 ms``; ``49.73 rad/s`` beside ``>= 5 Hz``
  reads ``7.915 Hz``; a ratio beside ``<= 6 dB`` reads in dB);
* a limit without a unit shows the metric's own unit (times scaled to ms or us below 1 s);
* headroom is shown in the same unit; a relative figure only for linear quantities; for dB
  quantities and ratios limited in dB the headroom is a difference in dB.

Significant digits: 4 by default; ``LOOPLEDGER_DIGITS`` or :func:`set_digits` (the CLI's
``--digits``) for more.
"""

from __future__ import annotations

import math

from .errors import UnitError
from .units import (_DB, _PERCENT, _RATIO, _LIMIT_RE, _COMPARATOR_ALIASES, convert,
                    format_value, limit_unit_text)

__all__ = ["digits", "set_digits", "shown_unit", "to_shown", "value_text", "headroom_text",
           "headroom_shown", "delta_text", "change_text", "headroom_delta_text", "value_number", "number", "is_logarithmic", "DEFAULT_DIGITS"]

DEFAULT_DIGITS = 4
_digits: int | None = None


def set_digits(n: int | None) -> None:
    """Set the significant digits of every shown value (``None``: back to the default)."""
    global _digits
    if n is not None and not 1 <= int(n) <= 17:
        raise ValueError("digits must be between 1 and 17")
    _digits = None if n is None else int(n)


def digits() -> int:
    """Significant digits in use: :func:`set_digits`, else ``$LOOPLEDGER_DIGITS``, else 4."""
    if _digits is not None:
        return _digits
    from .config import digits_setting

    env = digits_setting()
    try:
        n = int(env)
    except ValueError:
        return DEFAULT_DIGITS
    return n if 1 <= n <= 17 else DEFAULT_DIGITS


def number(x: float | None, d: int | None = None, *, sign: bool = False) -> str:
    """A number with ``d`` significant digits (``-`` for None, ``inf`` for infinity)."""
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "-"
    d = d or digits()
    if math.isinf(x):
        return ("+inf" if sign else "inf") if x > 0 else "-inf"
    return f"{x:+.{d}g}" if sign else f"{x:.{d}g}"


def _mode(unit: str, limit_text: str) -> tuple[str, str, float]:
    """(mode, shown unit text, factor): mode ``linear`` (value / factor), ``todb`` (ratio
    shown in dB), ``toratio`` (dB shown as a ratio) or ``own`` (the metric's own unit)."""
    u = limit_unit_text(limit_text)
    if unit == "bool" or not u:
        return "own", unit, 1.0
    if unit == "ratio" and u in _DB:
        return "todb", "dB", 1.0
    if unit == "dB" and u in ("ratio", "x", "abs"):
        return "toratio", "", 1.0
    if u in _RATIO and unit in ("ratio", ""):
        return "linear", "", 1.0
    if u in _PERCENT:
        return "linear", "%", (1.0 if unit == "%" else convert(1.0, "%", unit))
    if u in _DB and unit == "dB":
        return "linear", "dB", 1.0
    try:
        k = convert(1.0, u, unit)
    except UnitError:
        return "own", unit, 1.0
    if not math.isfinite(k) or k == 0:
        return "own", unit, 1.0
    return "linear", u, k


def shown_unit(unit: str, limit_text: str = "") -> str:
    """The unit a value of a metric in ``unit`` is shown in beside ``limit_text``."""
    return _mode(unit, limit_text)[1]


def is_logarithmic(unit: str, limit_text: str = "") -> bool:
    """True when the shown quantity is in dB (a dB metric, or a ratio limited in dB)."""
    mode, su, _ = _mode(unit, limit_text)
    return su == "dB" or (mode == "own" and unit == "dB")


def to_shown(value: float | None, unit: str, limit_text: str = "") -> float | None:
    """``value`` (in the metric's ``unit``) converted to the unit of ``limit_text``."""
    if value is None:
        return None
    mode, _, k = _mode(unit, limit_text)
    if mode == "todb":
        return 20.0 * math.log10(value) if value > 0 else -math.inf
    if mode == "toratio":
        return 10.0 ** (value / 20.0)
    return value / k


def _join(text: str, u: str) -> str:
    return f"{text} {u}" if u and u not in ("ratio",) else text


def value_text(value: float | None, unit: str, limit_text: str = "",
               d: int | None = None) -> str:
    """A value as shown beside its limit, e.g. ``value_text(0.1451, 's', '<= 200 ms')`` ->
    ``'145.1 ms'``."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "-"
    d = d or digits()
    mode, su, _ = _mode(unit, limit_text)
    if mode == "own":
        return format_value(value, unit, d)
    return _join(number(to_shown(value, unit, limit_text), d), su)


def _limit_parts(limit_text: str) -> tuple[str, float] | None:
    m = _LIMIT_RE.match(limit_text or "")
    if not m:
        return None
    return _COMPARATOR_ALIASES.get(m["cmp"], m["cmp"]), float(m["num"])


def headroom_shown(value: float | None, headroom: float | None, unit: str,
                   limit_text: str = "") -> float | None:
    """Headroom in the shown unit (a difference in dB for a ratio limited in dB)."""
    from .judge import headroom as _headroom

    if headroom is None or unit == "bool":
        return None
    mode, _, k = _mode(unit, limit_text)
    if mode in ("todb", "toratio"):
        parts = _limit_parts(limit_text)
        if parts is None or value is None:
            return None
        return _headroom(parts[0], to_shown(value, unit, limit_text), parts[1])
    return headroom / k


def headroom_text(value: float | None, headroom: float | None, fraction: float | None,
                  unit: str, limit_text: str = "", d: int | None = None, *,
                  relative: bool = True) -> str:
    """Headroom as shown, e.g. ``+54.87 ms (27 % of the limit)``, ``+2.1 dB``, ``+3 %pt``."""
    if headroom is None or unit == "bool":
        return "-"
    d = d or digits()
    mode, su, _ = _mode(unit, limit_text)
    h = headroom_shown(value, headroom, unit, limit_text)
    if h is None:
        return "-"
    if mode == "own":
        if unit == "s" and math.isfinite(h):
            text = format_value(h, "s", d)
            text = text if text.startswith("-") else "+" + text
        else:
            text = _join(number(h, d, sign=True), unit)
    else:
        text = _join(number(h, d, sign=True), su)
    shown = su if mode != "own" else unit
    if shown == "%":
        return text + "pt"
    if relative and fraction is not None and math.isfinite(fraction) \
            and not is_logarithmic(unit, limit_text) and mode != "toratio":
        text += f" ({number(100 * fraction, 2 if d <= 4 else d - 2, sign=True)} % of the limit)"
    return text


def delta_text(old: float | None, new: float | None, unit: str, limit_text: str = "",
               d: int | None = None) -> str:
    """Change of a value between two results, in the shown unit (``new - old``)."""
    if old is None or new is None:
        return "-"
    a, b = to_shown(old, unit, limit_text), to_shown(new, unit, limit_text)
    if a is None or b is None or not (math.isfinite(a) and math.isfinite(b)):
        return "-"
    mode, su, _ = _mode(unit, limit_text)
    if mode == "own":
        if unit == "s":
            t = format_value(b - a, "s", d or digits())
            return t if t.startswith("-") else "+" + t
        return _join(number(b - a, d, sign=True), unit)
    return _join(number(b - a, d, sign=True), su) + ("pt" if su == "%" else "")


def change_text(value: float | None, change: float | None, unit: str, limit_text: str = "",
                d: int | None = None) -> str:
    """A small change ``change`` (metric unit) of a value at ``value``, in the shown unit,
    linearised there (a slope times a step: for a ratio shown in dB, ``20 / ln 10 x change /
    value`` dB); ``%pt`` for percentages."""
    if value is None or change is None or not (math.isfinite(value) and math.isfinite(change)):
        return "-"
    mode, su, k = _mode(unit, limit_text)
    if mode == "todb":
        if value <= 0:
            return "-"
        shown, u = 20.0 / math.log(10.0) * change / value, "dB"
    elif mode == "toratio":
        shown, u = math.log(10.0) / 20.0 * 10.0 ** (value / 20.0) * change, ""
    elif mode == "own":
        if unit == "s":
            t = format_value(change, "s", d or digits())
            return t if t.startswith("-") else "+" + t
        shown, u = change, unit
    else:
        shown, u = change / k, su
    return _join(number(shown, d, sign=True), u) + ("pt" if u == "%" else "")


def headroom_delta_text(old_value: float | None, new_value: float | None,
                        old_headroom: float | None, new_headroom: float | None, unit: str,
                        limit_text: str = "", change: float | None = None,
                        d: int | None = None) -> str:
    """Change of headroom between two results in the shown unit, with the relative change
    ``(+12 %)`` for linear quantities only."""
    a = headroom_shown(old_value, old_headroom, unit, limit_text)
    b = headroom_shown(new_value, new_headroom, unit, limit_text)
    if a is None or b is None or (math.isinf(a) and math.isinf(b) and a == b):
        return "-"
    delta = b - a
    mode, su, _ = _mode(unit, limit_text)
    u = unit if mode == "own" else su
    if u == "s" and math.isfinite(delta):
        text = format_value(delta, "s", d or digits())
        text = text if text.startswith("-") else "+" + text
    else:
        text = _join(number(delta, d, sign=True), u) + ("pt" if u == "%" else "")
    if change is not None and math.isfinite(change) and u != "%" \
            and not is_logarithmic(unit, limit_text) and mode != "toratio":
        text += f" ({change:+.0%})"
    return text


def value_number(value: float | None, unit: str, limit_text: str = "",
                 d: int | None = None) -> str:
    """Only the number of :func:`value_text`, in the limit's unit (for a cell whose row
    already shows the limit, hence the unit); the metric's own unit when the limit has none."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "-"
    if unit == "bool":
        return format_value(value, unit)
    return number(to_shown(value, unit, limit_text), d)
