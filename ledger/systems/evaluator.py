"""Batched numeric evaluation of a parsed model over many parameter sets at once.

Values are rational functions held as two coefficient arrays of shape ``(V, k)`` (highest
power first) with one row per variant; all arithmetic is vectorised over the variant axis.
Shapes follow the static counts computed by the parser exactly (no cancellation, leading
zeros kept), so a model's output shape does not depend on parameter values.
"""

from __future__ import annotations

import numpy as np

from ledger.errors import ModelError
from ledger.systems.blocks import block_coefficients
from ledger.systems.nodes import (SS, Block, Coeffs, Delay, Neg, Num, Param, Pow, Prod, Sum,
                                  Var, Zpk)

__all__ = ["evaluate_tree", "polymul", "polyadd", "CONJUGATE_RTOL"]

CONJUGATE_RTOL = 1e-9
"""Relative size of the imaginary part left in a zpk polynomial above which the roots are
declared not to come in conjugate pairs."""


def polymul(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row-wise product of coefficient arrays ``(V, n)`` and ``(V, m)`` -> ``(V, n+m-1)``."""
    v, n = a.shape
    m = b.shape[1]
    out = np.zeros((v, n + m - 1), dtype=np.result_type(a, b))
    for i in range(n):  # loop over the (small) degree, never over variants
        out[:, i:i + m] += a[:, i:i + 1] * b
    return out


def polyadd(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row-wise sum of coefficient arrays, aligned at the constant term."""
    n = max(a.shape[1], b.shape[1])
    a = np.pad(a, ((0, 0), (n - a.shape[1], 0)))
    b = np.pad(b, ((0, 0), (n - b.shape[1], 0)))
    return a + b


class _Eval:
    def __init__(self, env: dict[str, np.ndarray], nvar: int, text: str):
        self.env = env
        self.v = nvar
        self.text = text
        self.delay = np.zeros(nvar)

    def where(self, pos: int) -> str:
        return f" (column {pos + 1} of {self.text!r})" if self.text else ""

    def const(self, node) -> np.ndarray:
        """Value of a constant expression, shape (V,)."""
        num, den = self.rat(node)
        d = den[:, 0]
        if np.any(d == 0):
            raise ModelError(f"division by zero in a constant expression{self.where(node.pos)}")
        return num[:, 0] / d

    def real_const(self, node, what: str) -> np.ndarray:
        x = self.const(node)
        if np.iscomplexobj(x):
            x = x.real
        if not np.all(np.isfinite(x)):
            raise ModelError(f"{what} is not a finite number{self.where(node.pos)}")
        return x.astype(float)

    def rat(self, node) -> tuple[np.ndarray, np.ndarray]:
        v = self.v
        if isinstance(node, Num):
            return np.full((v, 1), node.value), np.ones((v, 1))
        if isinstance(node, Param):
            return self.env[node.name].reshape(v, 1).astype(float), np.ones((v, 1))
        if isinstance(node, Var):
            return np.tile([1.0, 0.0], (v, 1)), np.ones((v, 1))
        if isinstance(node, Neg):
            num, den = self.rat(node.operand)
            return -num, den
        if isinstance(node, Sum):
            num, den = self.rat(node.terms[0][1])
            for sign, t, _ in node.terms[1:]:
                n2, d2 = self.rat(t)
                if sign == "-":
                    n2 = -n2
                num = polyadd(polymul(num, d2), polymul(n2, den))
                den = polymul(den, d2)
            return num, den
        if isinstance(node, Prod):
            num, den = np.ones((v, 1)), np.ones((v, 1))
            for op, f, pos in node.factors:
                n2, d2 = self.rat(f)
                if op == "*":
                    num, den = polymul(num, n2), polymul(den, d2)
                else:
                    if np.any(np.all(n2 == 0, axis=1)):
                        raise ModelError(f"division by zero{self.where(pos)}; check the divisor "
                                         f"and its parameter values")
                    num, den = polymul(num, d2), polymul(den, n2)
            return num, den
        if isinstance(node, Pow):
            bn, bd = self.rat(node.base)
            num, den = np.ones((v, 1)), np.ones((v, 1))
            for _ in range(node.exponent):
                num, den = polymul(num, bn), polymul(den, bd)
            return num, den
        if isinstance(node, Block):
            args = {}
            for name, arg in node.args:
                if isinstance(arg, float):
                    args[name] = np.full(v, arg)
                else:
                    args[name] = self.real_const(arg, f"argument {name!r} of {node.name}()")
            return block_coefficients(node.name, args)
        if isinstance(node, Delay):
            tau = self.real_const(node.arg, "the delay")
            if np.any(tau < 0):
                raise ModelError(f"delay must be zero or positive (seconds), got "
                                 f"{tau[tau < 0][0]:g}{self.where(node.pos)}")
            self.delay = self.delay + tau
            return np.ones((v, 1)), np.ones((v, 1))
        if isinstance(node, Zpk):
            return self.zpk(node)
        if isinstance(node, Coeffs):
            return self.coeffs(node)
        if isinstance(node, SS):
            raise ModelError("an ss(...) model has no parametric coefficient form here; "
                             "evaluate it one variant at a time")
        raise TypeError(f"unknown node {type(node).__name__}")  # pragma: no cover

    def roots_poly(self, items, what: str, pos: int) -> np.ndarray:
        p = np.ones((self.v, 1), dtype=complex)
        for it in items:
            r = self.const(it)
            if not np.all(np.isfinite(r)):
                raise ModelError(f"a {what} is not finite{self.where(it.pos)}")
            p = polymul(p, np.stack([np.ones(self.v, dtype=complex), -r], axis=1))
        scale = np.max(np.abs(p), axis=1, keepdims=True)
        if np.any(np.abs(p.imag) > CONJUGATE_RTOL * scale):
            raise ModelError(f"complex {what}s must come in conjugate pairs (a+bj with a-bj)"
                             f"{self.where(pos)}")
        return p.real.copy()

    def coeffs(self, node: Coeffs):
        """Numerator and denominator in powers of z (highest first) of a firmware form."""
        v = self.v

        def row(items, what):
            return np.stack([self.real_const(x, what) for x in items], axis=1) if items \
                else np.zeros((v, 0))

        if node.kind == "diffeq":
            b = row(node.rows[0], "a b coefficient")
            a = row(node.rows[1], "an a coefficient")
            n = node.info.nlen - 1
            num = np.pad(b, ((0, 0), (0, n + 1 - b.shape[1])))
            den = np.pad(np.concatenate([np.ones((v, 1)), a], axis=1),
                         ((0, 0), (0, n - a.shape[1])))
            return num, den
        num, den = np.ones((v, 1)), np.ones((v, 1))
        for r in node.rows:
            c = row(r, "a section coefficient")
            num = polymul(num, c[:, :3])
            den = polymul(den, np.concatenate([np.ones((v, 1)), c[:, 3:]], axis=1))
        if node.gain is not None:
            num = num * self.real_const(node.gain, "the sos gain")[:, None]
        return num, den

    def zpk(self, node: Zpk):
        k = self.real_const(node.gain, "the zpk gain")
        num = self.roots_poly(node.zeros, "zero", node.pos) * k[:, None]
        den = self.roots_poly(node.poles, "pole", node.pos)
        return num, den


def evaluate_tree(tree, env: dict[str, np.ndarray], nvar: int, text: str = ""
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Evaluate a parsed (non-``ss``) model for ``nvar`` parameter sets.

    Parameters
    ----------
    tree : node
        Root from :func:`ledger.systems.parser.parse`.
    env : dict of str to ndarray (V,)
        Finite real value of every parameter per variant.
    nvar : int
        Number of variants V.
    text : str
        The model text, for messages.

    Returns
    -------
    num, den : ndarray (V, k)
        Real coefficients, highest power first, not normalised.
    delay : ndarray (V,)
        Total pure delay in seconds.

    Raises
    ------
    ModelError
        Division by zero, non-finite results, a block argument out of range, complex roots
        without their conjugates, a negative delay.
    """
    ev = _Eval(env, nvar, text)
    with np.errstate(all="ignore"):
        num, den = ev.rat(tree)
    if np.iscomplexobj(num) or np.iscomplexobj(den):  # only reachable through zpk items
        num, den = num.real, den.real
    num = np.asarray(num, dtype=float)
    den = np.asarray(den, dtype=float)
    if not (np.all(np.isfinite(num)) and np.all(np.isfinite(den))):
        raise ModelError("the model's coefficients overflow to infinity or NaN; rescale the "
                         "model or its parameter values")
    if np.any(np.all(den == 0, axis=1)):
        raise ModelError("the model's denominator is zero; check the model and its parameters")
    return num, den, ev.delay
