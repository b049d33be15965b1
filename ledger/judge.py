"""Verdicts and headroom: a pure function of a limit and a metric value.

Headroom is the signed distance from the limit in the metric's unit, positive when the value
is on the passing side: ``limit - value`` for ``<``/``<=``, ``value - limit`` for ``>``/``>=``,
``-|value - limit|`` for ``==``.  The fraction divides by ``|limit|`` (``None`` when the limit
is 0).  Infinite values give infinite headroom of the right sign.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from .units import Limit

__all__ = ["Judgement", "judge", "VERDICTS", "worse", "headroom_array", "passes_array",
           "MATRIX_VERDICTS", "count_verdicts"]

VERDICTS = ("pass", "fail", "error", "n/a", "stale")
#: the words a matrix cell may show, in the order counts are reported
MATRIX_VERDICTS = ("pass", "fail", "error", "stale", "unverified")


def count_verdicts(items, words=MATRIX_VERDICTS, *, attr: str = "verdict") -> dict[str, int]:
    """How many of ``items`` (anything with a ``verdict``, or the attribute ``attr``) carry
    each verdict: every word of ``words`` present (0 when none), then any other verdict met,
    in the order met.  The one count behind the UI, the exports, the matrix and baselines."""
    out = {w: 0 for w in words}
    for it in items:
        v = getattr(it, attr)
        out[v] = out.get(v, 0) + 1
    return out


@dataclass(frozen=True)
class Judgement:
    verdict: str
    headroom: float | None
    headroom_fraction: float | None


def _passes(cmp_: str, value: float, limit: float) -> bool:
    if cmp_ == "<=":
        return value <= limit
    if cmp_ == "<":
        return value < limit
    if cmp_ == ">=":
        return value >= limit
    if cmp_ == ">":
        return value > limit
    if cmp_ == "==":
        return value == limit
    raise ValueError(f"unknown comparator {cmp_!r}")


def headroom(cmp_: str, value: float, limit: float) -> float:
    if cmp_ in ("<=", "<"):
        return limit - value
    if cmp_ in (">=", ">"):
        return value - limit
    return -abs(value - limit)


def judge(limit: Limit, value: float) -> Judgement:
    """Judge ``value`` (in ``limit.unit``) against ``limit``."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return Judgement("error", None, None)
    h = headroom(limit.comparator, value, limit.value)
    frac = None
    if limit.value != 0 and math.isfinite(limit.value):
        frac = h / abs(limit.value)
    return Judgement("pass" if _passes(limit.comparator, value, limit.value) else "fail", h, frac)


def worse(cmp_: str, a: float, b: float) -> bool:
    """True if ``a`` is closer to failing ``cmp_`` than ``b`` (i.e. ``a`` has less headroom)."""
    return headroom(cmp_, a, 0.0) < headroom(cmp_, b, 0.0)


def headroom_array(cmp_: str, values, limit: float):
    """:func:`headroom` of many values at once (numpy array in, array out)."""
    import numpy as np

    v = np.asarray(values, dtype=float)
    if cmp_ in ("<=", "<"):
        return limit - v
    if cmp_ in (">=", ">"):
        return v - limit
    if cmp_ == "==":
        return -np.abs(v - limit)
    raise ValueError(f"unknown comparator {cmp_!r}")


def passes_array(cmp_: str, values, limit: float):
    """Boolean array: which values pass ``cmp_ limit``."""
    import numpy as np

    v = np.asarray(values, dtype=float)
    ops = {"<=": np.less_equal, "<": np.less, ">=": np.greater_equal, ">": np.greater,
           "==": np.equal}
    if cmp_ not in ops:
        raise ValueError(f"unknown comparator {cmp_!r}")
    return ops[cmp_](v, limit)
