"""Matrices of a closed-loop batch for the time kernels: the batched matrix exponential, the
augmented matrices, diagonal balancing and the final value (equilibrium) of a step."""

from __future__ import annotations

import numpy as np

from ledger.engine.types import SSBatch
from ledger.errors import ComputeError

__all__ = ["expm_batch", "mats", "balance_scales", "balance", "has_delay", "equilibrium"]


# --------------------------------------------------------------------------- exact sampled propagation
# Coefficients of the [13/13] Pade approximant of exp and its scaling threshold (Higham, "The
# scaling and squaring method for the matrix exponential revisited", SIAM J. Matrix Anal.
# Appl. 26(4), 2005); checked against scipy.linalg.expm in the tests.
_PADE13 = (64764752532480000.0, 32382376266240000.0, 7771770303897600.0, 1187353796428800.0,
           129060195264000.0, 10559470521600.0, 670442572800.0, 33522128640.0, 1323241920.0,
           40840800.0, 960960.0, 16380.0, 182.0, 1.0)
_THETA13 = 5.371920351148152


def expm_batch(X: np.ndarray) -> np.ndarray:
    """Matrix exponential of a stack ``X (P, m, m)``, vectorised over the stack.

    Scaling and squaring with the [13/13] Pade approximant, one scaling per matrix; the same
    algorithm as ``scipy.linalg.expm`` without its per-matrix Python loop (which dominates
    when P is large and m small).

    Parameters
    ----------
    X : ndarray (P, m, m)

    Returns
    -------
    ndarray (P, m, m)
    """
    X = np.asarray(X, dtype=float)
    P, m = X.shape[0], X.shape[-1]
    if P == 0 or m == 0:
        return np.broadcast_to(np.eye(m), X.shape).copy()
    norm = np.max(np.sum(np.abs(X), axis=-2), axis=-1)
    with np.errstate(divide="ignore"):
        sq = np.where(norm > _THETA13, np.ceil(np.log2(norm / _THETA13)), 0.0).astype(int)
    A = X / (2.0 ** sq)[:, None, None]
    b = _PADE13
    eye = np.broadcast_to(np.eye(m), A.shape)
    A2 = A @ A
    A4 = A2 @ A2
    A6 = A4 @ A2
    U = A @ (A6 @ (b[13] * A6 + b[11] * A4 + b[9] * A2)
             + b[7] * A6 + b[5] * A4 + b[3] * A2 + b[1] * eye)
    Vm = (A6 @ (b[12] * A6 + b[10] * A4 + b[8] * A2)
          + b[6] * A6 + b[4] * A4 + b[2] * A2 + b[0] * eye)
    R = np.linalg.solve(Vm - U, Vm + U)
    for j in range(int(sq.max(initial=0))):
        more = sq > j
        R[more] = R[more] @ R[more]
    return R


# --------------------------------------------------------------------------- matrices
def mats(sys: SSBatch):
    """``A (V,n,n), B (V,n), C (V,n), D (V,)`` as float arrays; ComputeError on NaN or inf."""
    A = np.asarray(sys.A, dtype=float)
    V, n = A.shape[0], A.shape[1]
    B = np.asarray(sys.B, dtype=float).reshape(V, n)
    C = np.asarray(sys.C, dtype=float).reshape(V, n)
    D = np.asarray(sys.D, dtype=float).reshape(V)
    for name, arr in (("A", A), ("B", B), ("C", C), ("D", D)):
        if not np.all(np.isfinite(arr)):
            raise ComputeError(f"matrix {name} of the closed loop holds NaN or inf; check the model")
    return A, B, C, D


def _channel(sys: SSBatch):
    V, n = sys.nvar, sys.nstate

    def get(x, shape):
        return np.zeros(shape) if x is None else np.asarray(x, dtype=float).reshape(shape)

    return (get(sys.Bw, (V, n)), get(sys.Cz, (V, n)), get(sys.Dz, (V,)),
            get(sys.Dw, (V,)), get(sys.Dzw, (V,)))


def balance_scales(M: np.ndarray) -> np.ndarray:
    """Balancing scales (powers of 2) of a stack of square matrices ``M (V, m, m)``.

    ``scipy.linalg.matrix_balance`` (no permutation) of one matrix per pattern of binary
    exponents and zero entries, applied to every matrix with that pattern (the variants of a
    family mostly share a few patterns).  Any power-of-2 diagonal similarity is exact, so the
    choice only affects conditioning, never the transfer function.

    Returns
    -------
    ndarray (V, m)
        ``T`` with ``T^-1 M T`` balanced (``M * T[:, None, :] / T[:, :, None]``).
    """
    import scipy.linalg

    M = np.asarray(M, dtype=float)
    V, m = M.shape[0], M.shape[-1]
    key = np.ascontiguousarray(np.where(M == 0.0, -4096, np.frexp(M)[1]).reshape(V, -1))
    # the first variant of each pattern stands for it (a dict of the rows' bytes: sorting the
    # rows as np.unique(axis=0) does costs more than the balancing itself)
    first: dict[bytes, int] = {}
    reps: list[int] = []
    inv = np.empty(V, dtype=int)
    for v, row in enumerate(key):
        g = first.setdefault(row.tobytes(), len(first))
        if g == len(reps):
            reps.append(v)
        inv[v] = g
    T = np.empty((len(reps), m))
    for g, j in enumerate(reps):
        T[g] = scipy.linalg.matrix_balance(M[j], permute=False, separate=True)[1][0]
    return T[inv]


#: the last ``balance`` scales: ((A shape, A bytes), T); a pure function of A
_LAST_BALANCE: list = [None]


def balance(sys: SSBatch) -> SSBatch:
    """The same batch in diagonally rescaled state coordinates (powers of 2, no rounding).

    ``A -> T^-1 A T, B -> T^-1 B, C -> C T`` (and ``Bw, Cz`` alike) with ``T`` from
    ``scipy.linalg.matrix_balance``, so that ``||A||`` is close to the largest ``|lam|``.
    Realisations from polynomial coefficients can have entries 1e9 apart; without this the
    matrix exponential of ``M h`` needs many squarings and loses accuracy.  Outputs and
    eigenvalues are unchanged.
    """
    from dataclasses import replace

    A = np.asarray(sys.A, dtype=float)
    V, n = A.shape[0], A.shape[1]
    if n < 2:
        return sys
    key = (A.shape, A.tobytes())
    last = _LAST_BALANCE[0]
    if last is not None and last[0] == key:     # the paths of one loop share A
        T = last[1]
    else:
        T = balance_scales(A)
        T.flags.writeable = False
        _LAST_BALANCE[0] = (key, T)
    out = dict(A=A * T[:, None, :] / T[:, :, None],
               B=np.asarray(sys.B, dtype=float).reshape(V, n) / T,
               C=np.asarray(sys.C, dtype=float).reshape(V, n) * T)
    if sys.Bw is not None:
        out["Bw"] = np.asarray(sys.Bw, dtype=float).reshape(V, n) / T
    if sys.Cz is not None:
        out["Cz"] = np.asarray(sys.Cz, dtype=float).reshape(V, n) * T
    rows = sys.grid_rows
    if rows is not None and rows.shape[0] == V and rows.shape[2] == n + 1:
        rows = np.array(rows, dtype=float)
        rows[:, :, :n] *= T[:, None, :]
        out["grid_rows"] = rows
    elif rows is not None:
        out["grid_rows"] = None
    return replace(sys, **out)


def has_delay(sys: SSBatch) -> bool:
    """True for a continuous batch with an internal delay ``tau > 0``."""
    return sys.dt is None and float(sys.tau or 0.0) > 0.0


# --------------------------------------------------------------------------- final value
def equilibrium(sys: SSBatch, amplitude: float, singular_rcond: float):
    """Equilibrium for a constant input ``amplitude`` (input units).

    Returns ``(x_ss (V,n), w_ss (V,), y_ss (V,))``; raises :class:`ComputeError` when the
    equilibrium matrix has reciprocal condition number below ``singular_rcond``.
    """
    A, B, C, D = mats(sys)
    V, n = A.shape[0], A.shape[1]
    u = float(amplitude)
    Aeq = A - np.eye(n) if sys.dt is not None else A
    delay = has_delay(sys)
    if delay:
        Bw, Cz, Dz, Dw, Dzw = _channel(sys)
        Meq = np.zeros((V, n + 1, n + 1))
        Meq[:, :n, :n] = Aeq
        Meq[:, :n, n] = Bw
        Meq[:, n, :n] = Cz
        Meq[:, n, n] = Dzw - 1.0
        rhs = -np.concatenate([B, Dz[:, None]], axis=1) * u
    else:
        Meq, rhs = Aeq, -B * u
    if Meq.shape[1] > 0:
        sv = np.linalg.svd(Meq, compute_uv=False)
        rc = np.where(sv[:, 0] > 0, sv[:, -1] / np.where(sv[:, 0] > 0, sv[:, 0], 1.0), 0.0)
        bad = rc < singular_rcond
        if np.any(bad):
            idx = np.nonzero(bad)[0].tolist()
            raise ComputeError(
                f"equilibrium is singular for variant(s) {idx[:10]} (reciprocal condition"
                f" {float(rc[bad][0]):.2e}): the output integrates a step (pole at"
                f" {'z=1' if sys.dt is not None else 's=0'}), so there is no final value;"
                " use a path without a free integrator")
        sol = np.linalg.solve(Meq, rhs[:, :, None])[:, :, 0]
    else:
        sol = np.zeros((V, 0))
    x = sol[:, :n]
    if delay:
        w = sol[:, n]
        y = np.einsum("vi,vi->v", C, x) + D * u + Dw * w
    else:
        w = np.zeros(V)
        y = np.einsum("vi,vi->v", C, x) + D * u
    return x, w, y
