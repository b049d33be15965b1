"""The slope of a metric value in one plant parameter from five values on a line.

Pure arithmetic on numbers the engine measured (no engine, no database).  The five values are
taken at ``p0 + k h`` for ``k = -2, -1, 0, 1, 2`` (``p0`` the parameter's value at the worst
variant, ``h`` the step).  Formulas (Taylor expansion; any numerical-analysis text, e.g.
Burden and Faires, *Numerical Analysis*, sections 4.1-4.2):

* central difference ``D(h) = (f(1) - f(-1)) / 2h = f' + h^2 f'''/6 + O(h^4)``, the slope
  reported;
* truncation estimate ``|D(2h) - D(h)| / 3`` with ``D(2h) = (f(2) - f(-2)) / 4h``
  (Richardson: the ``h^2`` term of ``D(h)``);
* rounding estimate ``value_rtol * max|f| / h`` (each value assumed good to ``value_rtol``
  relative);
* one-sided slopes ``F = (-3 f(0) + 4 f(1) - f(2)) / 2h`` and ``B = (3 f(0) - 4 f(-1) +
  f(-2)) / 2h``, both ``f' - h^2 f'''/3 + O(h^3)``: for a smooth function they differ by
  ``O(h^3)`` only, while a kink (slope jump ``J``) makes them differ by ``J`` and a jump in
  the value within two steps by about ``1/h`` times the jump.

A slope is called smooth when ``|F - B| <= kink_rtol * max(|F|, |B|) + 8 value_rtol max|f| / h``
(the last term: what rounding alone can make of ``F - B``); otherwise the value is reported
as not smooth with both one-sided slopes, never as one number.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping

__all__ = ["OFFSETS", "Slope", "slope_from"]

#: the stencil: multiples of the step at which the value is measured (0 is the worst variant)
OFFSETS = (-2, -1, 0, 1, 2)

SMOOTH = "smooth"
NOT_SMOOTH = "not smooth"
ONE_SIDED = "one-sided"
INFINITE = "infinite"
CANNOT = "cannot"


@dataclass(frozen=True)
class Slope:
    """The slope of a value in one parameter, or why there is none.

    Attributes
    ----------
    status : str
        ``smooth`` (``derivative`` is the central difference), ``not smooth`` (a kink, a jump
        or a crossing that appears within two steps: ``forward`` and ``backward`` are the
        one-sided slopes), ``one-sided`` (one side could not be measured: the other side's
        slope in ``forward`` or ``backward``), ``infinite`` (the value is infinite here) or
        ``cannot`` (neither side could be measured).
    derivative : float or None
        Central difference, value unit per parameter unit (``smooth`` only).
    truncation, rounding : float or None
        Error estimates of ``derivative`` (``smooth`` only).
    forward, backward : float or None
        Second-order one-sided slopes (None where a side could not be measured).
    step : float
        The step ``h`` in the parameter's unit.
    note : str
        Why a slope is not smooth or missing, in words (values in the metric's own unit).
    """

    status: str
    derivative: float | None
    truncation: float | None
    rounding: float | None
    forward: float | None
    backward: float | None
    step: float
    note: str = ""


def _finite(x) -> bool:
    return x is not None and math.isfinite(x)


def _side(values: Mapping[int, float | None], errors: Mapping[int, str], ks) -> str:
    """'' when both points of a side are finite, else why not."""
    for k in ks:
        if k in errors or values.get(k) is None:
            return errors.get(k, "no value")
        if not math.isfinite(values[k]):
            return f"the value is {values[k]:g}"
    return ""


def slope_from(values: Mapping[int, float | None], h: float, *,
               errors: Mapping[int, str] | None = None, kink_rtol: float = 0.01,
               value_rtol: float = 1e-10) -> Slope:
    """The slope of ``values`` (offset ``k`` -> value at ``p0 + k h``) at offset 0.

    Parameters
    ----------
    values : mapping of int to float or None
        Values at the offsets :data:`OFFSETS` (``None`` or missing: not measured).
    h : float
        Step (> 0), in the parameter's unit.
    errors : mapping of int to str, optional
        Why the value at an offset could not be measured.
    kink_rtol : float
        Largest relative difference of the one-sided slopes still called smooth (default 1 %).
    value_rtol : float
        Relative accuracy assumed of each value (default 1e-10; the engine refines crossings
        and extrema to 1e-13 or better, docs/metrics.md).

    Returns
    -------
    Slope
    """
    if not h > 0:
        raise ValueError(f"the step must be positive, got {h!r}")
    errors = dict(errors or {})
    f0 = values.get(0)
    if 0 in errors or f0 is None:
        return Slope(CANNOT, None, None, None, None, None, h,
                     f"the worst variant itself cannot be measured: {errors.get(0, 'no value')}")
    lows, highs = _side(values, errors, (-1, -2)), _side(values, errors, (1, 2))
    if not math.isfinite(f0):
        if all(values.get(k) == f0 for k in OFFSETS if k not in errors):
            return Slope(INFINITE, None, None, None, None, None, h,
                         f"the value is {f0:g} here and at every step around it")
        return Slope(NOT_SMOOTH, None, None, None, None, None, h,
                     f"the value is {f0:g} here but finite within two steps (a crossing "
                     "appears)")
    fwd = bwd = None
    if not highs:
        fwd = (-3 * f0 + 4 * values[1] - values[2]) / (2 * h)
    if not lows:
        bwd = (3 * f0 - 4 * values[-1] + values[-2]) / (2 * h)
    crossing = any(values.get(k) is not None and not math.isfinite(values[k]) and k not in errors
                   for k in OFFSETS)
    if lows and highs:
        status = NOT_SMOOTH if crossing else CANNOT
        return Slope(status, None, None, None, None, None, h,
                     f"neither side can be measured: below {lows}; above {highs}")
    if lows or highs:
        status = NOT_SMOOTH if crossing else ONE_SIDED
        where, why = ("below", lows) if lows else ("above", highs)
        what = "a crossing appears or vanishes" if crossing else "one-sided only"
        return Slope(status, None, None, None, fwd, bwd, h,
                     f"{what}: {where} the worst variant {why}")
    fmax = max(abs(values[k]) for k in OFFSETS)
    floor = 8 * value_rtol * fmax / h
    gap = abs(fwd - bwd)
    if gap > kink_rtol * max(abs(fwd), abs(bwd)) + floor:
        return Slope(NOT_SMOOTH, None, None, None, fwd, bwd, h,
                     f"the slopes above and below differ by more than {kink_rtol:.0%}: a "
                     "kink, a jump or a switch of the deciding crossing or peak within two "
                     "steps")
    d1 = (values[1] - values[-1]) / (2 * h)
    d2 = (values[2] - values[-2]) / (4 * h)
    return Slope(SMOOTH, d1, abs(d2 - d1) / 3, value_rtol * fmax / h, fwd, bwd, h)
