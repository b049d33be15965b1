"""Exact zero-order-hold discretisation of a continuous plant with an input delay.

A digital loop holds the controller output constant over each sample interval ``Ts``.  The
continuous plant ``x' = A x + B v, y = C x + D v`` driven through a transport delay
``theta = m Ts + f`` (``m`` whole samples, ``0 <= f < Ts``) is, at the sample instants,
exactly (modified z-transform written in state space; Franklin, Powell and Workman,
*Digital Control of Dynamic Systems*, 3rd ed., section 4.3.4)::

    x[k+1] = Phi x[k] + Gamma0 u[k-m] + Gamma1 u[k-m-1]
    Phi    = exp(A Ts)
    Gamma0 = int_0^{Ts-f} exp(A s) ds B
    Gamma1 = exp(A (Ts-f)) int_0^{f} exp(A s) ds B
    y[k]   = C x[k] + D u[k-m]        (f == 0)
    y[k]   = C x[k] + D u[k-m-1]      (f > 0: at t = k Ts the held value is the older one)

Each integral comes from one matrix exponential of ``[[A, B], [0, 0]]``.  The past inputs
become extra states, so the result is an ordinary discrete state-space model.
"""

from __future__ import annotations

import math

import numpy as np
import scipy.linalg

from ..errors import ModelError

__all__ = ["split_delay", "zoh_matrices", "zoh_discretize", "zoh_discretize_inputs",
           "shift_register"]


def split_delay(delay: float, sample_time: float, *, rel_tol: float = 1e-9) -> tuple[int, float]:
    """Split a delay into whole samples and a fractional remainder.

    Parameters
    ----------
    delay : float
        Delay in seconds, >= 0.
    sample_time : float
        Sample time in seconds, > 0.
    rel_tol : float, optional
        A remainder within ``rel_tol * sample_time`` of 0 or of ``sample_time`` is snapped to
        a whole sample (default 1e-9, dimensionless).

    Returns
    -------
    m : int
        Whole samples.
    frac : float
        Remainder in seconds, ``0 <= frac < sample_time``.
    """
    ratio = delay / sample_time
    m = int(math.floor(ratio))
    frac = delay - m * sample_time
    if frac <= rel_tol * sample_time:
        frac = 0.0
    elif sample_time - frac <= rel_tol * sample_time:
        m += 1
        frac = 0.0
    return m, frac


def _integral(A: np.ndarray, B: np.ndarray, t: float) -> tuple[np.ndarray, np.ndarray]:
    """Return ``exp(A t)`` and ``int_0^t exp(A s) ds B`` from one matrix exponential."""
    n = A.shape[0]
    M = np.zeros((n + 1, n + 1))
    M[:n, :n] = A * t
    M[:n, n] = B * t
    E = scipy.linalg.expm(M)
    return E[:n, :n], E[:n, n]


def zoh_matrices(A, B, sample_time: float, frac: float = 0.0):
    """ZOH matrices ``Phi, Gamma0, Gamma1`` for a fractional input delay ``frac`` in [0, Ts).

    Parameters
    ----------
    A : ndarray (n, n)
    B : ndarray (n,)
    sample_time : float
        Ts in seconds.
    frac : float
        Fractional delay in seconds, ``0 <= frac < Ts``.

    Returns
    -------
    Phi, Gamma0, Gamma1 : ndarray
        See the module docstring; ``Gamma1`` is zero when ``frac == 0``.
    """
    A = np.asarray(A, dtype=float)
    B = np.asarray(B, dtype=float).reshape(-1)
    n = A.shape[0]
    if n == 0:
        return np.zeros((0, 0)), np.zeros(0), np.zeros(0)
    E1, G0 = _integral(A, B, sample_time - frac)
    if frac == 0.0:
        return E1, G0, np.zeros(n)
    Ef, Gf = _integral(A, B, frac)
    return E1 @ Ef, G0, E1 @ Gf


def shift_register(m: int):
    """State-space matrices of a pure delay of ``m`` samples (``z^-m``).

    Returns
    -------
    A (m, m), B (m,), C (m,), D float
    """
    if m <= 0:
        return np.zeros((0, 0)), np.zeros(0), np.zeros(0), 1.0
    A = np.eye(m, k=-1)
    B = np.zeros(m)
    B[0] = 1.0
    C = np.zeros(m)
    C[-1] = 1.0
    return A, B, C, 0.0


def _series(first, second):
    """Series connection of two SISO discrete state-space tuples (first feeds second)."""
    A1, B1, C1, D1 = first
    A2, B2, C2, D2 = second
    n1, n2 = A1.shape[0], A2.shape[0]
    A = np.zeros((n1 + n2, n1 + n2))
    A[:n1, :n1] = A1
    A[n1:, :n1] = np.outer(B2, C1)
    A[n1:, n1:] = A2
    B = np.concatenate([B1, B2 * D1])
    C = np.concatenate([D2 * C1, C2])
    D = D2 * D1
    return A, B, C, D


def _siso_arrays(A, B, C, D):
    """State-space matrices of a SISO block as (n,n), (n,), (n,) arrays and a float D."""
    A = np.atleast_2d(np.asarray(A, dtype=float))
    if A.size == 0:
        A = np.zeros((0, 0))
    B = np.asarray(B, dtype=float).reshape(-1)
    C = np.asarray(C, dtype=float).reshape(-1)
    D = float(np.asarray(D, dtype=float).reshape(-1)[0]) if np.size(D) else 0.0
    return A, B, C, D


def zoh_discretize(A, B, C, D, sample_time: float, delay: float = 0.0):
    """Exact ZOH discretisation of a continuous SISO plant with an input delay.

    Parameters
    ----------
    A, B, C, D : array_like
        Continuous state-space matrices (``B`` and ``C`` 1-D, ``D`` scalar).
    sample_time : float
        Ts in seconds, > 0.
    delay : float, optional
        Input transport delay in seconds, >= 0 (default 0).

    Returns
    -------
    tuple (Ad, Bd, Cd, Dd)
        Discrete matrices; the state is ``[x, held past input (if fractional), delay line]``.
    """
    if not (math.isfinite(sample_time) and sample_time > 0):
        raise ModelError(f"sample time {sample_time!r} s is not positive and finite; give Ts > 0")
    if not (math.isfinite(delay) and delay >= 0):
        raise ModelError(f"delay {delay!r} s is negative or not finite; give a delay >= 0")
    A, B, C, D = _siso_arrays(A, B, C, D)
    n = A.shape[0]
    m, frac = split_delay(delay, sample_time)
    Phi, G0, G1 = zoh_matrices(A, B, sample_time, frac)
    if frac > 0.0:
        # state [x; v_prev]: v_prev[k+1] = v[k]
        Ad = np.zeros((n + 1, n + 1))
        Ad[:n, :n] = Phi
        Ad[:n, n] = G1
        Bd = np.concatenate([G0, [1.0]])
        Cd = np.concatenate([C, [D]])
        Dd = 0.0
    else:
        Ad, Bd, Cd, Dd = Phi, G0, C.copy(), D
    return _series(shift_register(m), (Ad, Bd, Cd, Dd))


def _delayed_inputs(Phi, C, D, parts, n):
    """Assemble x[k+1] = Phi x + sum_i (G0_i v_i[k-m_i] + G1_i v_i[k-m_i-1]) with delay lines.

    ``parts`` is a list of ``(G0, G1, m, frac_positive)`` per input.  Each input gets a delay
    line ``s_j = v[k-j]``, ``j = 1..L`` with ``L = m + frac_positive``.
    """
    lengths = [m + (1 if fp else 0) for (_, _, m, fp) in parts]
    N = n + sum(lengths)
    k = len(parts)
    A = np.zeros((N, N))
    A[:n, :n] = Phi
    B = np.zeros((N, k))
    Cd = np.zeros(N)
    Cd[:n] = C
    Dd = np.zeros(k)
    start = n
    for i, ((G0, G1, m, fp), L) in enumerate(zip(parts, lengths)):
        def place(vec, lag, i=i, start=start):
            """Add ``vec * v_i[k - lag]`` to x[k+1]."""
            if lag == 0:
                B[:n, i] += vec
            else:
                A[:n, start + lag - 1] += vec
        place(G0, m)
        if fp:
            place(G1, m + 1)
        lag_feed = m + (1 if fp else 0)
        if lag_feed == 0:
            Dd[i] += D
        else:
            Cd[start + lag_feed - 1] += D
        if L:
            B[start, i] = 1.0
            for j in range(1, L):
                A[start + j, start + j - 1] = 1.0
        start += L
    return A, B, Cd, Dd


def zoh_discretize_inputs(A, B, C, D, sample_time: float, delays, *, discrete: bool = False):
    """Exact ZOH discretisation of a plant driven by several inputs with their own delays.

    All inputs enter where ``B`` does (e.g. the controller output and an input disturbance)
    but reach it through different delays.

    Parameters
    ----------
    A, B, C, D : array_like
        SISO state-space matrices of the plant (``B``, ``C`` 1-D, ``D`` scalar).
    sample_time : float
        Ts in seconds, > 0.
    delays : sequence of float
        Delay in seconds of each input, >= 0.
    discrete : bool, optional
        The matrices are already discrete with sample time Ts (default False); delays must
        then be whole samples.

    Returns
    -------
    tuple (Ad (N, N), Bd (N, k), Cd (N,), Dd (k,))

    Raises
    ------
    ModelError
        A non-positive sample time, a negative delay, or a fractional delay on a discrete plant.
    """
    if not (math.isfinite(sample_time) and sample_time > 0):
        raise ModelError(f"sample time {sample_time!r} s is not positive and finite; give Ts > 0")
    A, B, C, D = _siso_arrays(A, B, C, D)
    n = A.shape[0]
    parts = []
    Phi = A if discrete else None
    for delay in delays:
        if not (math.isfinite(delay) and delay >= 0):
            raise ModelError(f"delay {delay!r} s is negative or not finite; give a delay >= 0")
        m, frac = split_delay(delay, sample_time)
        if discrete:
            if frac:
                raise ModelError(f"delay {delay} s is not a whole number of samples of "
                                 f"{sample_time} s; give a continuous plant instead")
            parts.append((B, np.zeros(n), m, False))
            continue
        P, G0, G1 = zoh_matrices(A, B, sample_time, frac)
        Phi = P
        parts.append((G0, G1, m, frac > 0.0))
    if Phi is None:
        Phi = zoh_matrices(A, B, sample_time, 0.0)[0]
    return _delayed_inputs(Phi, C, D, parts, n)
