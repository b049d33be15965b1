"""Turning a continuous controller into the discrete one that runs, and back for review.

Methods (``method`` text as recorded with a revision; see docs/digital.md)::

    zoh             zero-order hold: exact for a piecewise-constant input,
                    Ad = exp(A T), Bd = int_0^T exp(A s) ds B, Cd = C, Dd = D
    tustin          bilinear map s = (2/T) (z - 1)/(z + 1)
    tustin@W        bilinear map pre-warped at W rad/s (``tustin@30Hz`` gives W in hertz):
                    s = c (z - 1)/(z + 1), c = W / tan(W T / 2); the discrete response
                    equals the continuous one at exactly W
    matched         matched pole-zero: every finite pole and zero p maps to exp(p T); zeros
                    at infinity map to z = -1 (Franklin, Powell and Workman, *Digital Control
                    of Dynamic Systems*, 3rd ed., section 6.3.3, from memory); the gain is
                    matched at s = 0 (z = 1) after taking out the poles and zeros at s = 0,
                    each of which counts as s ~ (z - 1)/T there

The inverse maps (:func:`continuous_equivalent`) give the continuous controller that the
recorded method would have turned into a given discrete one, where it exists: Tustin always
(unless a pole sits at z = -1), ZOH when the state matrix has a real logarithm (no
eigenvalue on the closed negative real axis), matched when no pole or zero lies on the
negative real axis other than zeros at exactly z = -1 (read back as zeros at infinity).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np

from ..errors import ModelError

__all__ = ["Discretization", "parse_discretization", "discretize", "continuous_equivalent",
           "METHODS"]

METHODS = ("zoh", "tustin", "matched")

_NUMBER = r"[0-9]+(?:\.[0-9]*)?(?:[eE][+-]?[0-9]+)?|\.[0-9]+(?:[eE][+-]?[0-9]+)?"
#: a pre-warp frequency: a number or a product of numbers and ``pi`` (``2*pi*30``)
_FACTOR = rf"(?:{_NUMBER}|pi)"
_TEXT = re.compile(rf"^\s*(zoh|tustin|matched)\s*(?:@\s*({_FACTOR}(?:\s*\*\s*{_FACTOR})*)\s*"
                   r"(hz|rad/s)?)?\s*$", re.IGNORECASE)


@dataclass(frozen=True)
class Discretization:
    """A discretisation method: ``method`` in :data:`METHODS`, ``prewarp`` in rad/s (Tustin
    only) or ``None``."""

    method: str
    prewarp: float | None = None

    @property
    def text(self) -> str:
        """Canonical text: ``zoh``, ``tustin``, ``tustin@<rad/s>``, ``matched``."""
        if self.prewarp is None:
            return self.method
        return f"{self.method}@{self.prewarp!r}"

    def describe(self) -> str:
        """Words for a reader: ``Tustin pre-warped at 188.5 rad/s (30 Hz)``."""
        if self.method == "zoh":
            return "zero-order hold"
        if self.method == "matched":
            return "matched pole-zero"
        if self.prewarp is None:
            return "Tustin"
        return (f"Tustin pre-warped at {self.prewarp:.6g} rad/s "
                f"({self.prewarp / (2 * math.pi):.6g} Hz)")


def parse_discretization(text) -> Discretization | None:
    """Read a method text (``"zoh"``, ``"tustin"``, ``"tustin@188.5"``, ``"tustin@2*pi*30"``,
    ``"tustin@30Hz"``, ``"matched"``); ``None`` or ``""`` give ``None``; a :class:`Discretization` is returned
    as it is.

    Raises
    ------
    ModelError
        Unknown method, a pre-warp frequency on a method other than Tustin, or a frequency
        that is not positive and finite.
    """
    if text is None or isinstance(text, Discretization):
        return text
    if not isinstance(text, str):
        raise ModelError(f"discretisation {text!r} is not text; use zoh, tustin, "
                         "tustin@FREQ or matched")
    if not text.strip():
        return None
    m = _TEXT.match(text)
    if m is None:
        raise ModelError(f"discretisation {text!r} is unknown; use zoh, tustin, tustin@FREQ "
                         "(rad/s, or with Hz) or matched")
    method, freq, unit = m.group(1).lower(), m.group(2), (m.group(3) or "rad/s").lower()
    if freq is None:
        return Discretization(method)
    if method != "tustin":
        raise ModelError(f"discretisation {text!r}: only tustin takes a pre-warp frequency")
    w = math.prod(math.pi if f.strip().lower() == "pi" else float(f) for f in freq.split("*"))
    w *= 2 * math.pi if unit == "hz" else 1.0
    if not (math.isfinite(w) and w > 0):
        raise ModelError(f"discretisation {text!r}: the pre-warp frequency must be > 0")
    return Discretization("tustin", w)


def _trim(p) -> np.ndarray:
    p = np.atleast_1d(np.asarray(p, dtype=float))
    nz = np.flatnonzero(p != 0.0)
    return p[nz[0]:] if nz.size else np.zeros(1)


def _tf_parts(sys) -> tuple[np.ndarray, np.ndarray]:
    import control

    if isinstance(sys, (int, float, np.integer, np.floating)):
        return np.array([float(sys)]), np.ones(1)
    if isinstance(sys, control.StateSpace):
        sys = control.ss2tf(sys)
    if sys.ninputs != 1 or sys.noutputs != 1:
        raise ModelError("only SISO controllers can be discretised")
    return _trim(sys.num[0][0]), _trim(sys.den[0][0])


def _bilinear(num, den, c: float) -> tuple[np.ndarray, np.ndarray]:
    """Substitute s = c (z - 1)/(z + 1) into num/den (both multiplied by (z + 1)^n)."""
    n = max(num.size, den.size) - 1

    def sub(p):
        out = np.zeros(n + 1)
        deg = p.size - 1
        for i, coef in enumerate(p):          # coef multiplies s^(deg - i)
            k = deg - i
            term = np.array([coef * c ** k])
            for _ in range(k):
                term = np.convolve(term, [1.0, -1.0])
            for _ in range(n - k):
                term = np.convolve(term, [1.0, 1.0])
            out += term
        return out

    return sub(num), sub(den)


def _inverse_bilinear(num, den, c: float) -> tuple[np.ndarray, np.ndarray]:
    """Substitute z = (c + s)/(c - s) (both multiplied by (c - s)^n)."""
    n = max(num.size, den.size) - 1

    def sub(p):
        out = np.zeros(n + 1)
        deg = p.size - 1
        for i, coef in enumerate(p):          # coef multiplies z^(deg - i)
            k = deg - i
            term = np.array([coef])
            for _ in range(k):
                term = np.convolve(term, [1.0, c])
            for _ in range(n - k):
                term = np.convolve(term, [-1.0, c])
            out += term
        return out

    return sub(num), sub(den)


def _zoh(num, den, ts: float):
    import control
    import scipy.linalg

    if den.size == 1:
        return num / den, np.ones(1)
    A, B, C, D = _ss(num, den)
    n = A.shape[0]
    M = np.zeros((n + 1, n + 1))
    M[:n, :n] = A * ts
    M[:n, n] = B * ts
    E = scipy.linalg.expm(M)
    sysd = control.ss2tf(control.ss(E[:n, :n], E[:n, n:], C[None, :], [[D]], ts))
    return _trim(sysd.num[0][0]), _trim(sysd.den[0][0])


def _ss(num, den):
    """Controllable canonical form of num/den (den made monic)."""
    num = num / den[0]
    den = den / den[0]
    n = den.size - 1
    num = np.concatenate([np.zeros(n + 1 - num.size), num])
    D = num[0]
    A = np.zeros((n, n))
    A[0, :] = -den[1:]
    A[1:, :-1] = np.eye(n - 1)
    B = np.zeros(n)
    B[0] = 1.0
    C = num[1:] - D * den[1:]
    return A, B, C, float(D)


def _gain_match(num_s, den_s, zeros_z, poles_z, ts):
    """Gain of the matched controller: ``K(s) s^-k`` at s = 0 equals
    ``H(z) ((z - 1)/T)^-k`` at z = 1, with k = (poles at 0) - (zeros at 0)."""
    zs = np.roots(num_s) if num_s.size > 1 else np.zeros(0)
    ps = np.roots(den_s) if den_s.size > 1 else np.zeros(0)
    tol = 1e-12

    def strip(r):
        keep = np.abs(r) > tol * max(1.0, float(np.max(np.abs(r), initial=0.0)))
        return r[keep], int(np.sum(~keep))

    zs_nz, kz = strip(zs)
    ps_nz, kp = strip(ps)
    # continuous gain without the roots at 0: leading-coefficient ratio times prod(-roots)
    k_s = (num_s[0] / den_s[0]) * np.prod(-zs_nz) / np.prod(-ps_nz)
    zz_nz = zeros_z[np.abs(zeros_z - 1.0) > 1e-12]
    pz_nz = poles_z[np.abs(poles_z - 1.0) > 1e-12]
    # discrete: H(z) = g prod(z - zz)/prod(z - pz); the (z - 1) factors stand for T s each
    h1 = np.prod(1.0 - zz_nz) / np.prod(1.0 - pz_nz) * ts ** (kz - kp)
    return float(np.real(k_s / h1))


def _matched(num, den, ts):
    zs = np.roots(num) if num.size > 1 else np.zeros(0)
    ps = np.roots(den) if den.size > 1 else np.zeros(0)
    zz = np.exp(zs * ts)
    pz = np.exp(ps * ts)
    extra = ps.size - zs.size
    if extra > 0:
        zz = np.concatenate([zz, -np.ones(extra)])
    g = _gain_match(num, den, zz, pz, ts)
    return g * np.real(np.poly(zz)), np.real(np.poly(pz))


def discretize(sys, sample_time: float, method) -> "object":
    """The discrete controller (``control.TransferFunction`` with ``dt = sample_time``) that
    ``method`` makes of the continuous SISO controller ``sys``.

    Parameters
    ----------
    sys : control.LTI or float
        Continuous controller (``dt`` 0 or None).
    sample_time : float
        T in seconds, > 0.
    method : str or Discretization

    Raises
    ------
    ModelError
        Unknown method, an improper controller, a pre-warp frequency at or above the Nyquist
        frequency pi / T.
    """
    import control

    d = parse_discretization(method)
    if d is None:
        raise ModelError("no discretisation method given; use zoh, tustin, tustin@FREQ or "
                         "matched")
    ts = float(sample_time)
    if not (math.isfinite(ts) and ts > 0):
        raise ModelError(f"sample time {sample_time!r} s is not positive and finite")
    num, den = _tf_parts(sys)
    if num.size > den.size:
        raise ModelError("the controller is improper (more zeros than poles); it has no "
                         "discrete equivalent: add a derivative filter")
    if d.method == "zoh":
        nz, dz = _zoh(num, den, ts)
    elif d.method == "matched":
        nz, dz = _matched(num, den, ts)
    else:
        c = 2.0 / ts
        if d.prewarp is not None:
            if d.prewarp * ts / 2 >= math.pi / 2:
                raise ModelError(f"pre-warp frequency {d.prewarp:.6g} rad/s is at or above the "
                                 f"Nyquist frequency {math.pi / ts:.6g} rad/s of T = {ts} s")
            c = d.prewarp / math.tan(d.prewarp * ts / 2)
        nz, dz = _bilinear(num, den, c)
    nz, dz = _trim(nz), _trim(dz)
    lead = dz[0]
    return control.tf(nz / lead, dz / lead, ts)


def continuous_equivalent(sys, method) -> "object | None":
    """The continuous controller that ``method`` would turn into the discrete ``sys``, or
    ``None`` where the inverse map does not exist (see the module docstring)."""
    import control
    import scipy.linalg

    d = parse_discretization(method)
    ts = sys.dt if not isinstance(sys, (int, float)) else None
    if d is None or ts in (None, 0, True):
        return None
    num, den = _tf_parts(sys)
    if den.size == 1:
        return control.tf(num / den, [1.0])
    if d.method == "tustin":
        c = 2.0 / ts if d.prewarp is None else d.prewarp / math.tan(d.prewarp * ts / 2)
        if abs(np.polyval(den, -1.0)) <= 1e-12 * np.sum(np.abs(den)):
            return None
        ns, ds = _inverse_bilinear(num, den, c)
        ns, ds = _trim(ns), _trim(ds)
        return control.tf(ns / ds[0], ds / ds[0])
    if d.method == "matched":
        zz = np.roots(num) if num.size > 1 else np.zeros(0)
        pz = np.roots(den)
        at_minus_one = np.abs(zz + 1.0) < 1e-6  # repeated roots come out to ~sqrt(eps)
        zz = zz[~at_minus_one]

        def neg_real(r):
            return bool(np.any((np.abs(r.imag) < 1e-12) & (r.real <= 0)))

        if neg_real(zz) or neg_real(pz):
            return None
        zs, ps = np.log(zz.astype(complex)) / ts, np.log(pz.astype(complex)) / ts
        ns, ds = np.real(np.poly(zs)), np.real(np.poly(ps))
        g = _gain_match(ns, ds, np.concatenate([np.exp(zs * ts),
                                                -np.ones(int(at_minus_one.sum()))]),
                        np.exp(ps * ts), ts)
        hz = num[0] / den[0]
        # _gain_match gives the discrete gain of ns/ds; scale so it equals the given one
        k = hz / g if g else 1.0
        return control.tf(k * ns, ds)
    # zoh: matrix logarithm of the state matrix
    A, B, C, D = _ss(num, den)
    ev = np.linalg.eigvals(A)
    if np.any((np.abs(ev.imag) < 1e-12) & (ev.real <= 0)):
        return None
    Ac = scipy.linalg.logm(A) / ts
    if np.max(np.abs(np.imag(Ac)), initial=0.0) > 1e-9 * max(1.0, np.max(np.abs(Ac))):
        return None
    Ac = np.real(Ac)
    Bc = np.linalg.solve(_phi_integral(Ac, ts), B)
    sysc = control.ss2tf(control.ss(Ac, Bc[:, None], C[None, :], [[D]]))
    ns, ds = _trim(sysc.num[0][0]), _trim(sysc.den[0][0])
    return control.tf(ns / ds[0], ds / ds[0])


def _phi_integral(A, ts):
    """``int_0^T exp(A s) ds`` from one matrix exponential of ``[[A, I], [0, 0]] T``."""
    import scipy.linalg

    n = A.shape[0]
    M = np.zeros((2 * n, 2 * n))
    M[:n, :n] = A * ts
    M[:n, n:] = np.eye(n) * ts
    return scipy.linalg.expm(M)[:n, n:]
