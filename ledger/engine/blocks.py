"""SISO blocks of a loop: checked state-space realisations with zeros, poles and gain for exact
frequency evaluation, made one by one (:func:`make_block`) or for a whole family at once
(:func:`make_blocks`)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import control
import numpy as np
import scipy.linalg
import scipy.signal

from ..errors import ModelError
from .timegrid import balance_scales

__all__ = ["Block", "make_block", "make_blocks"]


def _trim(p: np.ndarray) -> np.ndarray:
    p = np.asarray(p, dtype=float).reshape(-1)
    nz = np.flatnonzero(p != 0.0)
    return p[nz[0]:] if nz.size else np.zeros(1)


@dataclass(frozen=True, eq=False)
class Block:
    """One SISO block: state-space matrices and zero/pole/gain for exact evaluation.

    ``dt`` is ``None`` (continuous), a float (discrete) or ``"any"`` (static gain).
    ``Bdist``/``Ddist`` are set for a discretised plant whose input disturbance reaches the
    plant through fewer delays than the controller output.
    """

    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    D: float
    zeros: np.ndarray
    poles: np.ndarray
    gain: float
    dt: Any
    Bdist: np.ndarray | None = None
    Ddist: float | None = None

    @property
    def order(self) -> int:
        return self.A.shape[0]

    @property
    def B_d(self) -> np.ndarray:
        """Input matrix of the plant-input disturbance (``B`` unless delays differ)."""
        return self.B if self.Bdist is None else self.Bdist

    @property
    def D_d(self) -> float:
        """Feedthrough of the plant-input disturbance (``D`` unless delays differ)."""
        return self.D if self.Ddist is None else self.Ddist

    def parts(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Numerator (gain included) and denominator products at complex points ``x``."""
        x = np.asarray(x, dtype=complex)
        num = np.prod(x[None, :] - self.zeros[:, None], axis=0) if self.zeros.size \
            else np.ones_like(x)
        den = np.prod(x[None, :] - self.poles[:, None], axis=0) if self.poles.size \
            else np.ones_like(x)
        return self.gain * num, den

    def __call__(self, x: np.ndarray) -> np.ndarray:
        """Evaluate at complex points ``x`` (s or z); ``inf`` exactly at a pole."""
        num, den = self.parts(x)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(den == 0, complex(np.inf, 0.0), num / np.where(den == 0, 1, den))


def _balance(A, B, C):
    """Diagonal state scaling that balances ``[[A, B], [C, 0]]`` (transfer function unchanged).

    Canonical realisations of plants with widely spread time constants have entries many
    orders of magnitude apart, which makes closed-loop equilibria needlessly ill-conditioned.
    """
    n = A.shape[0]
    if n == 0:
        return A, B, C
    B2 = B.reshape(n, -1)
    k = B2.shape[1]
    M = np.zeros((n + k, n + k))
    M[:n, :n], M[:n, n:], M[n, :n] = A, B2, C
    _, (scale, _) = scipy.linalg.matrix_balance(M, permute=False, separate=True)
    t = scale[:n] / scale[n]
    return A * t[None, :] / t[:, None], (B2 / t[:, None]).reshape(B.shape), C * t


def make_block(sys, role: str) -> Block:
    """Check one python-control SISO system and return it as a :class:`Block`.

    Raises
    ------
    ModelError
        Not a SISO LTI, non-finite coefficients, or improper (``role`` names the block).
    """
    if isinstance(sys, (int, float, np.integer, np.floating)):
        sys = control.tf(float(sys), 1)
    if not isinstance(sys, (control.TransferFunction, control.StateSpace)):
        raise ModelError(f"{role} is a {type(sys).__name__}, not a python-control "
                         "TransferFunction or StateSpace; give an LTI model")
    if sys.ninputs != 1 or sys.noutputs != 1:
        raise ModelError(f"{role} has {sys.ninputs} inputs and {sys.noutputs} outputs; "
                         "only SISO blocks are supported")
    if isinstance(sys, control.TransferFunction):
        num, den = _trim(sys.num[0][0]), _trim(sys.den[0][0])
        if not (np.all(np.isfinite(num)) and np.all(np.isfinite(den))) or not np.any(den):
            raise ModelError(f"{role} has non-finite or zero coefficients; fix the model")
        if num.size > den.size:
            raise ModelError(f"{role} is improper (more zeros than poles); an ideal "
                             "derivative needs a derivative filter, e.g. s/(T s + 1)")
        # controllable canonical form (the realisation python-control makes without
        # slycot), built here: the python-control object costs ~0.5 ms per block
        if den.size == 1:
            A, B, C = np.zeros((0, 0)), np.zeros(0), np.zeros(0)
            D = float(num[0] / den[0])
        else:
            try:
                A, B2, C2, D2 = scipy.signal.tf2ss(num, den)
            except ValueError as e:
                raise ModelError(f"{role} cannot be realised in state space: {e}") from e
            n = A.shape[0]
            A = np.asarray(A, dtype=float).reshape(n, n)
            B = np.asarray(B2, dtype=float).reshape(n)
            C = np.asarray(C2, dtype=float).reshape(n)
            D = float(np.asarray(D2, dtype=float).reshape(-1)[0])
    else:
        ss = sys
        if not all(np.all(np.isfinite(M)) for M in (ss.A, ss.B, ss.C, ss.D)):
            raise ModelError(f"{role} has non-finite matrix entries; fix the model")
        num = den = None
        A = np.asarray(ss.A, dtype=float).reshape(ss.nstates, ss.nstates)
        B = np.asarray(ss.B, dtype=float).reshape(ss.nstates)
        C = np.asarray(ss.C, dtype=float).reshape(ss.nstates)
        D = float(np.asarray(ss.D, dtype=float).reshape(-1)[0])
    A, B, C = _balance(A, B, C)
    if A.shape[0] == 0:
        dt = "any"
    elif sys.dt is None or sys.dt == 0:
        dt = None
    else:
        dt = sys.dt
    if num is None:
        zeros, poles, gain = _zpk_from_ss(A, B, C, D)
    elif not np.any(num):
        zeros, poles, gain = np.zeros(0, complex), np.zeros(0, complex), 0.0
    else:
        zeros = np.roots(num).astype(complex)
        poles = np.roots(den).astype(complex)
        gain = float(num[0] / den[0])
    return Block(A, B, C, D, zeros, poles, gain, dt)


def _batch_roots(P: np.ndarray) -> np.ndarray:
    """Roots of the polynomials in the rows of ``P`` (V, k), as ``numpy.roots`` gives them.

    Every row must have a nonzero leading coefficient and the same number of trailing zeros
    (``numpy.roots`` returns those as roots at 0, last).  The companion matrices are the ones
    ``numpy.roots`` builds and their eigenvalues are found in one stacked LAPACK call.
    """
    V, k = P.shape
    nz = np.flatnonzero(P[0] != 0.0)
    trailing = k - 1 - int(nz[-1])
    p = P[:, :k - trailing]
    N = p.shape[1]
    if N > 1:
        comp = np.zeros((V, N - 1, N - 1))
        idx = np.arange(N - 2)
        comp[:, idx + 1, idx] = 1.0
        comp[:, 0, :] = -p[:, 1:] / p[:, :1]
        roots = np.linalg.eigvals(comp).astype(complex)
    else:
        roots = np.zeros((V, 0), complex)
    return np.concatenate([roots, np.zeros((V, trailing), complex)], axis=1)


def _balance_batch(A, B, C):
    """:func:`_balance` for a stack of realisations (V, n, n), (V, n), (V, n).

    The balancing scale (powers of two) is computed once per pattern of binary exponents and
    zeros of ``[[A, B], [C, 0]]`` (:func:`~ledger.engine.timegrid.balance_scales`) and applied
    to every realisation with that pattern; powers of two scale exactly, so each result is an
    exact similarity of its input.
    """
    V, n = B.shape
    M = np.zeros((V, n + 1, n + 1))
    M[:, :n, :n], M[:, :n, n], M[:, n, :n] = A, B, C
    scale = balance_scales(M)
    t = scale[:, :n] / scale[:, n:]
    return A * t[:, None, :] / t[:, :, None], B / t, C * t


def _tf_coefficients(sys):
    """(num, den) trimmed, when ``sys`` is a SISO TransferFunction the batched realisation
    handles exactly like :func:`make_block`; else ``None``."""
    if not isinstance(sys, control.TransferFunction) or sys.ninputs != 1 or sys.noutputs != 1:
        return None
    num, den = _trim(sys.num[0][0]), _trim(sys.den[0][0])
    if (den.size < 2 or num.size > den.size or not np.any(num)
            or not (np.all(np.isfinite(num)) and np.all(np.isfinite(den)))
            or not abs(num[0] / den[0]) > 1e-14):
        return None
    return num, den


def _shape_key(num, den):
    """(coefficient counts, trailing zeros) of a trimmed numerator and denominator."""
    return (num.size, den.size, num.size - 1 - int(np.flatnonzero(num)[-1]),
            den.size - 1 - int(np.flatnonzero(den)[-1]))


def make_blocks(systems, roles) -> list:
    """:func:`make_block` for many systems at once (the same blocks; a system it refuses
    raises its error, though with several bad systems not necessarily the first one's).

    SISO transfer functions that share numerator and denominator lengths and trailing zeros
    (the variants of one parametric family) are realised together: controllable canonical
    form from the stacked coefficients, roots from stacked companion matrices, one balancing
    per exponent pattern (see :func:`_balance_batch`).  Everything else goes through
    :func:`make_block` one by one.

    Parameters
    ----------
    systems : sequence of control.LTI or float
    roles : sequence of str
        Names of the blocks for error messages.

    Returns
    -------
    list of Block
    """
    out: list = [None] * len(systems)
    # raw coefficient rows of the SISO transfer functions, by coefficient counts
    raw: dict = {}
    for i, sys in enumerate(systems):
        if isinstance(sys, control.TransferFunction) and sys.ninputs == 1 \
                and sys.noutputs == 1:
            num, den = sys.num[0][0], sys.den[0][0]
            raw.setdefault((np.size(num), np.size(den)), []).append((i, num, den))
        else:
            out[i] = make_block(sys, roles[i])
    shapes: dict = {}
    for (m, k), items in raw.items():
        idx = np.array([it[0] for it in items])
        with np.errstate(all="ignore"):
            num = np.array([np.ravel(it[1]) for it in items], dtype=float).reshape(len(items), m)
            den = np.array([np.ravel(it[2]) for it in items], dtype=float).reshape(len(items), k)
            # rows the batched path takes as they are: already trimmed (nonzero leading
            # coefficients), finite, proper, dynamic, numerator not negligible
            fast = (np.all(np.isfinite(num), axis=1) & np.all(np.isfinite(den), axis=1)
                    & (num[:, 0] != 0) & (den[:, 0] != 0) & (k >= 2) & (m <= k)
                    & (np.abs(num[:, 0] / den[:, 0]) > 1e-14))
        for r in np.flatnonzero(~fast):
            i = int(idx[r])
            nd = _tf_coefficients(systems[i])
            if nd is None:
                out[i] = make_block(systems[i], roles[i])
            else:
                shapes.setdefault(_shape_key(*nd), []).append(([i], nd[0], nd[1]))
        if not fast.any():
            continue
        nf, df, ids = num[fast], den[fast], idx[fast]
        tz_n = np.argmax(nf[:, ::-1] != 0, axis=1)        # trailing zeros of each row
        tz_d = np.argmax(df[:, ::-1] != 0, axis=1)
        for a, b in sorted(set(zip(tz_n.tolist(), tz_d.tolist()))):
            sel = np.flatnonzero((tz_n == a) & (tz_d == b))
            shapes.setdefault((m, k, a, b), []).append((ids[sel], nf[sel], df[sel]))
    for (m, k, _tn, _td), parts in shapes.items():
        order = np.concatenate([np.atleast_1d(p[0]) for p in parts]).astype(int)
        num = np.concatenate([np.reshape(p[1], (-1, m)) for p in parts])
        den = np.concatenate([np.reshape(p[2], (-1, k)) for p in parts])
        V = order.size
        d0 = den[:, :1]
        numn, denn = num / d0, den / d0
        nump = np.zeros((V, k))
        nump[:, k - m:] = numn
        n = k - 1
        A = np.zeros((V, n, n))
        A[:, 0, :] = -denn[:, 1:]
        j = np.arange(n - 1)
        A[:, j + 1, j] = 1.0
        B = np.zeros((V, n))
        B[:, 0] = 1.0
        C = nump[:, 1:] - nump[:, :1] * denn[:, 1:]
        D = nump[:, 0]
        A, B, C = _balance_batch(A, B, C)
        zeros, poles = _batch_roots(num), _batch_roots(den)
        gains = num[:, 0] / den[:, 0]
        for r, i in enumerate(order.tolist()):
            dt = systems[i].dt
            out[i] = Block(A[r], B[r], C[r], float(D[r]), zeros[r], poles[r], float(gains[r]),
                           None if (dt is None or dt == 0) else dt)
    return out


def _zpk_from_ss(A, B, C, D, *, rel_tol: float = 1e-10):
    """Zeros, poles and gain of a SISO state-space model without forming polynomials.

    Poles are the eigenvalues of ``A``; zeros the finite generalised eigenvalues of the
    system pencil ``([[A, B], [C, D]], [[I, 0], [0, 0]])`` (Emami-Naeini and Van Dooren,
    Automatica 1982); the gain is the first non-zero Markov parameter ``C A^(r-1) B``
    (``D`` when ``r = 0``) with ``r`` the relative degree.  Converting to a transfer
    function instead leaves round-off in the leading numerator coefficients, which turns
    into spurious zeros far away.
    """
    n = A.shape[0]
    poles = np.linalg.eigvals(A).astype(complex) if n else np.zeros(0, complex)
    if n == 0:
        return np.zeros(0, complex), poles, float(D)
    M = np.zeros((n + 1, n + 1))
    M[:n, :n], M[:n, n], M[n, :n], M[n, n] = A, B, C, D
    N = np.zeros((n + 1, n + 1))
    N[:n, :n] = np.eye(n)
    alpha, beta = scipy.linalg.eigvals(M, N, homogeneous_eigvals=True)
    scale = max(1.0, float(np.max(np.abs(M))))
    finite = np.abs(beta) > rel_tol * np.abs(alpha) / scale
    zeros = (alpha[finite] / beta[finite]).astype(complex)
    if zeros.size > n:  # the whole pencil is singular: zero transfer function
        return np.zeros(0, complex), np.zeros(0, complex), 0.0
    r = n - zeros.size
    if r == 0:
        gain = float(D)
    else:
        v = B.copy()
        for _ in range(r - 1):
            v = A @ v
        gain = float(C @ v)
    if gain == 0.0:
        return np.zeros(0, complex), np.zeros(0, complex), 0.0
    return zeros, poles, gain


def _block_from_matrices(A, B2, C, D2, dt) -> Block:
    """Discrete plant block from matrices with inputs (controller output, disturbance)."""
    ss = control.ss(A, B2[:, :1], np.reshape(C, (1, -1)), D2[0], dt)
    zpk = make_block(ss, "discretised plant")
    Ab, Bb, Cb = _balance(np.asarray(A, float), np.asarray(B2, float), np.asarray(C, float))
    return Block(Ab, Bb[:, 0].copy(), Cb, float(D2[0]), zpk.zeros, zpk.poles, zpk.gain, dt,
                 Bdist=Bb[:, 1].copy(), Ddist=float(D2[1]))
