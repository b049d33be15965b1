"""Controller blocks that may be written in continuous-time model text.

Every block is a rational function of ``s`` with a fixed coefficient layout, computed for
a whole batch of argument values at once (arrays of shape ``(V,)``).  Frequencies are in
rad/s, time constants in seconds, damping ratios dimensionless.

==========================  ==============================================================
block                        transfer function
==========================  ==============================================================
``pid(kp, ki=0, kd=0, tf=0)``  kp + ki/s + kd*s/(tf*s + 1)
``pi(kp, ki)``               kp + ki/s
``pd(kp, kd, tf=0)``         kp + kd*s/(tf*s + 1)
``lead(k, wz, wp)``          k*(s/wz + 1)/(s/wp + 1)   (phase lead when wp > wz)
``lag(k, wz, wp)``           same formula as ``lead`` (phase lag when wp < wz)
``notch(w0, zeta_z, zeta_p)``  (s^2 + 2*zeta_z*w0*s + w0^2)/(s^2 + 2*zeta_p*w0*s + w0^2)
``lowpass(wc)``              1/(s/wc + 1)
``lowpass2(wn, zeta)``       wn^2/(s^2 + 2*zeta*wn*s + wn^2)
``integrator(ki)``           ki/s
``gain(k)``                  k
==========================  ==============================================================

In ``pid`` and ``pi`` an integral gain of exactly zero removes the pole at s = 0 (no
cancelled integrator is left in the model).  ``pid``/``pd`` with ``tf = 0`` and ``kd != 0``
is accepted here and gives an improper transfer function; the engine refuses it.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from ledger.errors import ModelError

__all__ = ["BlockSpec", "BLOCKS", "block_coefficients", "cancel_origin"]


@dataclass(frozen=True)
class BlockSpec:
    """Signature and coefficient layout of one controller block.

    Parameters
    ----------
    name : str
        The block's name in model text.
    args : tuple of str
        Argument names in positional order.
    defaults : dict
        Default values of the optional (trailing) arguments.
    nlen, dlen : int
        Number of numerator and denominator coefficients produced.
    formula : str
        The transfer function in words, for messages and documentation.
    """

    name: str
    args: tuple[str, ...]
    defaults: dict
    nlen: int
    dlen: int
    formula: str


BLOCKS: dict[str, BlockSpec] = {
    b.name: b for b in (
        BlockSpec("pid", ("kp", "ki", "kd", "tf"), {"ki": 0.0, "kd": 0.0, "tf": 0.0}, 3, 3,
                  "kp + ki/s + kd*s/(tf*s+1)"),
        BlockSpec("pi", ("kp", "ki"), {}, 2, 2, "kp + ki/s"),
        BlockSpec("pd", ("kp", "kd", "tf"), {"tf": 0.0}, 2, 2, "kp + kd*s/(tf*s+1)"),
        BlockSpec("lead", ("k", "wz", "wp"), {}, 2, 2, "k*(s/wz+1)/(s/wp+1)"),
        BlockSpec("lag", ("k", "wz", "wp"), {}, 2, 2, "k*(s/wz+1)/(s/wp+1)"),
        BlockSpec("notch", ("w0", "zeta_z", "zeta_p"), {}, 3, 3,
                  "(s^2+2*zeta_z*w0*s+w0^2)/(s^2+2*zeta_p*w0*s+w0^2)"),
        BlockSpec("lowpass", ("wc",), {}, 1, 2, "1/(s/wc+1)"),
        BlockSpec("lowpass2", ("wn", "zeta"), {}, 1, 3, "wn^2/(s^2+2*zeta*wn*s+wn^2)"),
        BlockSpec("integrator", ("ki",), {}, 1, 2, "ki/s"),
        BlockSpec("gain", ("k",), {}, 1, 1, "k"),
    )
}


def _require(name: str, arg: str, values: np.ndarray, ok: np.ndarray, what: str) -> None:
    if not np.all(ok):
        bad = values[~ok][0]
        raise ModelError(f"{name}(): argument {arg}={bad:g} must be {what}; fix the value")


def cancel_origin(num: np.ndarray, den: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Cancel exact common factors of s (trailing zero coefficients), keeping the shapes.

    Parameters
    ----------
    num, den : ndarray, shape (V, n) and (V, m)
        Coefficients, highest power first.

    Returns
    -------
    num, den : ndarray
        Same shapes; rows shifted right (zeros entering on the left) by the number of
        exactly-zero trailing coefficients they have in common.
    """
    def trailing_zeros(p):
        nz = p != 0
        # index of the last non-zero from the right; all-zero rows count as full length
        last = np.where(nz.any(axis=1), p.shape[1] - 1 - np.argmax(nz[:, ::-1], axis=1), -1)
        return p.shape[1] - 1 - last

    k = np.minimum(trailing_zeros(num), trailing_zeros(den))
    k = np.minimum(k, min(num.shape[1], den.shape[1]) - 1)
    if not np.any(k):
        return num, den

    def shift(p):
        cols = np.arange(p.shape[1])[None, :] - k[:, None]
        out = np.take_along_axis(p, np.clip(cols, 0, None), axis=1)
        return np.where(cols >= 0, out, 0.0)

    return shift(num), shift(den)


def _pid(a):
    kp, ki, kd, tf = a["kp"], a["ki"], a["kd"], a["tf"]
    _require("pid", "tf", tf, tf >= 0, "zero or positive (seconds)")
    num = np.stack([kp * tf + kd, kp + ki * tf, ki], axis=1)
    den = np.stack([tf, np.ones_like(tf), np.zeros_like(tf)], axis=1)
    return cancel_origin(num, den)


def _pi(a):
    kp, ki = a["kp"], a["ki"]
    num = np.stack([kp, ki], axis=1)
    den = np.stack([np.ones_like(kp), np.zeros_like(kp)], axis=1)
    return cancel_origin(num, den)


def _pd(a):
    kp, kd, tf = a["kp"], a["kd"], a["tf"]
    _require("pd", "tf", tf, tf >= 0, "zero or positive (seconds)")
    num = np.stack([kp * tf + kd, kp], axis=1)
    den = np.stack([tf, np.ones_like(tf)], axis=1)
    return num, den


def _leadlag(name):
    def f(a):
        k, wz, wp = a["k"], a["wz"], a["wp"]
        _require(name, "wz", wz, wz > 0, "positive (rad/s)")
        _require(name, "wp", wp, wp > 0, "positive (rad/s)")
        num = np.stack([k / wz, k], axis=1)
        den = np.stack([1.0 / wp, np.ones_like(wp)], axis=1)
        return num, den
    return f


def _notch(a):
    w0, zz, zp = a["w0"], a["zeta_z"], a["zeta_p"]
    _require("notch", "w0", w0, w0 > 0, "positive (rad/s)")
    _require("notch", "zeta_z", zz, zz >= 0, "zero or positive")
    _require("notch", "zeta_p", zp, zp >= 0, "zero or positive")
    one = np.ones_like(w0)
    num = np.stack([one, 2 * zz * w0, w0 ** 2], axis=1)
    den = np.stack([one, 2 * zp * w0, w0 ** 2], axis=1)
    return num, den


def _lowpass(a):
    wc = a["wc"]
    _require("lowpass", "wc", wc, wc > 0, "positive (rad/s)")
    return np.ones_like(wc)[:, None], np.stack([1.0 / wc, np.ones_like(wc)], axis=1)


def _lowpass2(a):
    wn, zeta = a["wn"], a["zeta"]
    _require("lowpass2", "wn", wn, wn > 0, "positive (rad/s)")
    _require("lowpass2", "zeta", zeta, zeta >= 0, "zero or positive")
    return (wn ** 2)[:, None], np.stack([np.ones_like(wn), 2 * zeta * wn, wn ** 2], axis=1)


def _integrator(a):
    ki = a["ki"]
    return cancel_origin(ki[:, None], np.stack([np.ones_like(ki), np.zeros_like(ki)], axis=1))


def _gain(a):
    k = a["k"]
    return k[:, None], np.ones_like(k)[:, None]


_FORMULAS: dict[str, Callable] = {
    "pid": _pid, "pi": _pi, "pd": _pd, "lead": _leadlag("lead"), "lag": _leadlag("lag"),
    "notch": _notch, "lowpass": _lowpass, "lowpass2": _lowpass2,
    "integrator": _integrator, "gain": _gain,
}


def block_coefficients(name: str, args: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Numerator and denominator coefficients of a block for a batch of argument values.

    Parameters
    ----------
    name : str
        Block name, a key of :data:`BLOCKS`.
    args : dict of str to ndarray (V,)
        Every argument of the block by name (defaults already filled in), real and finite.

    Returns
    -------
    num, den : ndarray, shapes (V, nlen) and (V, dlen)
        Coefficients in s, highest power first.

    Raises
    ------
    ModelError
        An argument is outside its allowed range (e.g. a negative frequency).
    """
    return _FORMULAS[name](args)
