"""Coefficient quantisation: the number format a controller's coefficients are stored in.

Formats (text as recorded with a revision; docs/digital.md)::

    fixed:W/F     signed two's-complement fixed point, W bits in all, F of them fractional:
                  a coefficient is stored as round(c 2^F) / 2^F (round to nearest, ties to
                  even) and must lie in [-2^(W-F-1), 2^(W-F-1) - 2^-F]
    single        IEEE 754 binary32 (round to nearest, ties to even, as numpy.float32)

What is quantised is the controller in the form it is entered: every coefficient of a
``diffeq``, of each ``sos`` section and its gain, every matrix entry of a ``zss``; any other
discrete controller (a polynomial in ``z``, or a continuous design after its discretisation)
as the difference-equation coefficients ``b0..bn, a1..an`` of its transfer function with
``a0 = 1`` (exactly representable, not quantised).  Only the coefficients are quantised:
signal rounding, overflow of intermediate sums and limit cycles are not modelled.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np

from ..errors import ModelError

__all__ = ["NumberFormat", "parse_number_format", "quantize_values", "quantize_text",
           "quantize_system", "pole_shift"]

_FIXED = re.compile(r"^\s*fixed\s*:\s*([0-9]+)\s*/\s*([0-9]+)\s*$", re.IGNORECASE)


@dataclass(frozen=True)
class NumberFormat:
    """``kind`` is ``"fixed"`` (``width`` W and ``frac`` F bits) or ``"single"``."""

    kind: str
    width: int = 0
    frac: int = 0

    @property
    def text(self) -> str:
        return f"fixed:{self.width}/{self.frac}" if self.kind == "fixed" else self.kind

    def describe(self) -> str:
        if self.kind == "single":
            return "IEEE single precision (binary32)"
        lo = -2.0 ** (self.width - self.frac - 1)
        return (f"signed fixed point, {self.width} bits, {self.frac} fractional "
                f"(step 2^-{self.frac}, range [{lo:g}, {-lo - 2.0 ** -self.frac:g}])")


def parse_number_format(text) -> NumberFormat:
    """Read ``fixed:W/F`` (1 <= W <= 64, 0 <= F < W) or ``single``.

    Raises
    ------
    ModelError
        Any other text.
    """
    if isinstance(text, NumberFormat):
        return text
    if not isinstance(text, str):
        raise ModelError(f"number format {text!r} is not text; use fixed:W/F or single")
    if text.strip().lower() == "single":
        return NumberFormat("single")
    m = _FIXED.match(text)
    if m is None:
        raise ModelError(f"number format {text!r} is unknown; use fixed:W/F (W bits, F "
                         "fractional, e.g. fixed:16/14) or single")
    w, f = int(m.group(1)), int(m.group(2))
    if not (1 <= w <= 64 and 0 <= f < w):
        raise ModelError(f"number format {text!r}: need 1 <= W <= 64 and 0 <= F < W")
    return NumberFormat("fixed", w, f)


def quantize_values(values, fmt: NumberFormat, what: str = "coefficient") -> np.ndarray:
    """The stored values of ``values`` in ``fmt`` (a float array of the same shape).

    Raises
    ------
    ModelError
        A value outside the format's range (named with its value).
    """
    x = np.asarray(values, dtype=float)
    if fmt.kind == "single":
        with np.errstate(over="ignore"):
            q = x.astype(np.float32)
        bad = np.isfinite(x) & ~np.isfinite(q)
        if bad.any():
            raise ModelError(f"{what} {x[bad].flat[0]!r} overflows IEEE single precision")
        return q.astype(float)
    scale = 2.0 ** fmt.frac
    ints = np.round(x * scale)          # numpy rounds ties to even
    top = 2.0 ** (fmt.width - 1)
    bad = (ints < -top) | (ints > top - 1)
    if bad.any():
        v = float(x[bad].flat[0])
        hi = (top - 1) / scale
        raise ModelError(f"{what} {v!r} does not fit {fmt.text} (range [{-top / scale:g}, "
                         f"{hi:g}]); give more integer bits (W - F)")
    return ints / scale


def _nonzero(b, fmt: NumberFormat) -> None:
    if not np.any(np.asarray(b) != 0.0):
        raise ModelError(f"every numerator coefficient rounds to 0 in {fmt.text}: the "
                         "controller output would be 0; give more fractional bits")


def _num(node) -> float:
    from ..systems.evaluator import evaluate_tree

    num, den, _ = evaluate_tree(node, {}, 1)
    return float(num[0, -1] / den[0, -1])


def _fmt_list(values) -> str:
    return "[" + ", ".join(repr(float(v)) for v in values) + "]"


def quantize_text(text: str, fmt, sample_time: float) -> str:
    """The controller text with every coefficient as stored in ``fmt`` (see the module
    docstring for which coefficients), in the same firmware form when it is one."""
    from ..systems import compile_model, parse_model
    from ..systems.nodes import SS, Coeffs

    fmt = parse_number_format(fmt)
    model = compile_model(text)
    if model.variable != "z":
        raise ModelError("only a discrete controller (in z, or a continuous design with its "
                         "discretisation method) can be quantised")
    tree = model.tree
    if isinstance(tree, Coeffs) and tree.kind == "diffeq":
        b = quantize_values([_num(x) for x in tree.rows[0]], fmt, "coefficient b")
        a = quantize_values([_num(x) for x in tree.rows[1]], fmt, "coefficient a")
        _nonzero(b, fmt)
        return f"diffeq({_fmt_list(b)}, {_fmt_list(a)})"
    if isinstance(tree, Coeffs):
        rows = [quantize_values([_num(x) for x in r], fmt, "section coefficient")
                for r in tree.rows]
        body = "[" + ", ".join(_fmt_list(r) for r in rows) + "]"
        if tree.gain is None:
            return f"sos({body})"
        g = quantize_values([_num(tree.gain)], fmt, "sos gain")[0]
        return f"sos({body}, {float(g)!r})"
    if isinstance(tree, SS):
        mats = []
        for m in (tree.a, tree.b, tree.c, tree.d):
            mats.append("[" + ", ".join(
                _fmt_list(quantize_values([_num(x) for x in row], fmt, "matrix entry"))
                for row in m) + "]")
        return f"zss({', '.join(mats)})"
    system = parse_model(text, sample_time=sample_time).system
    num = np.trim_zeros(np.asarray(system.num[0][0], dtype=float), "f")
    den = np.trim_zeros(np.asarray(system.den[0][0], dtype=float), "f")
    if num.size == 0:
        num = np.zeros(1)
    num, den = num / den[0], den / den[0]
    n = den.size - 1
    b = np.concatenate([np.zeros(max(0, n + 1 - num.size)), num])
    b = quantize_values(b, fmt, "coefficient b")
    a = quantize_values(den[1:], fmt, "coefficient a")
    _nonzero(b, fmt)
    if not math.isfinite(float(np.sum(np.abs(b)))):  # pragma: no cover - guarded above
        raise ModelError("a quantised coefficient is not finite")
    return f"diffeq({_fmt_list(b)}, {_fmt_list(a)})"


def quantize_system(system, fmt):
    """A discrete SISO system with its difference-equation coefficients (``b0..bn``,
    ``a1..an`` of the transfer function with ``a0 = 1``) as stored in ``fmt``."""
    import control

    fmt = parse_number_format(fmt)
    if isinstance(system, (int, float, np.integer, np.floating)):
        return float(quantize_values([float(system)], fmt, "gain")[0])
    if isinstance(system, control.StateSpace):
        system = control.ss2tf(system)
    num = np.trim_zeros(np.asarray(system.num[0][0], dtype=float), "f")
    den = np.trim_zeros(np.asarray(system.den[0][0], dtype=float), "f")
    if num.size == 0:
        num = np.zeros(1)
    num, den = num / den[0], den / den[0]
    b = quantize_values(num, fmt, "coefficient b")
    _nonzero(b, fmt)
    a = np.concatenate([[1.0], quantize_values(den[1:], fmt, "coefficient a")])
    return control.tf(b, a, system.dt)


def pole_shift(reference, moved) -> float:
    """Largest distance between the poles of two sets matched one to one so that the sum of
    distances is least (scipy.optimize.linear_sum_assignment); ``inf`` when the counts
    differ."""
    from scipy.optimize import linear_sum_assignment

    p = np.asarray(reference, dtype=complex).reshape(-1)
    q = np.asarray(moved, dtype=complex).reshape(-1)
    if p.size != q.size:
        return math.inf
    if p.size == 0:
        return 0.0
    cost = np.abs(p[:, None] - q[None, :])
    r, c = linear_sum_assignment(cost)
    return float(np.max(cost[r, c]))
