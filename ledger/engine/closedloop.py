"""Closed-loop batches of one group of variants: the interconnection of prefilter, controller,
plant and sensor with the delay cut at the measurement, the closed-loop paths, and the exact
frequency responses of L, S, T, CS and PS (see :mod:`ledger.engine.loop` for the signals)."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Callable

import numpy as np

from ..errors import ModelError
from .blocks import Block
from .types import FreqBatch, SSBatch

if TYPE_CHECKING:
    from .loop import LoopSpec

__all__ = ["PATHS", "ClosedLoopResponse", "LoopGroup", "Assembly"]

#: Closed-loop signal paths: input -> output.
PATHS = ("r->y", "r->e", "r->u", "d->y", "n->u")

_PATH_IO = {"r->y": ("r", "y"), "r->e": ("r", "e"), "r->u": ("r", "u"),
            "d->y": ("d", "y"), "n->u": ("n", "u")}


# --------------------------------------------------------------------------- assembly

@dataclass(frozen=True, eq=False)
class ClosedLoopResponse:
    """Exact frequency response of one closed-loop function (S, T, CS or PS) over a group.

    ``evaluate(w) -> complex (V, len(w))``; ``poles``/``zeros`` per variant for gridding
    (s-plane or z-plane like :class:`~ledger.engine.types.FreqBatch`).
    """

    evaluate: Callable[[np.ndarray], np.ndarray]
    dt: float | None
    poles: list
    zeros: list


@dataclass(frozen=True, eq=False)
class LoopGroup:
    """Variants that share a state dimension and a loop delay, batched together.

    Attributes
    ----------
    index : ndarray of int
        Positions of these variants in the family.
    tau : float
        Loop delay in s (0 for digital loops, where delays are in the state).
    paths : dict[str, SSBatch]
        Closed-loop batches keyed by :data:`PATHS`.
    loop_gain : FreqBatch
        L = C G H e^{-s tau}.
    closed : dict[str, ClosedLoopResponse]
        ``"S"``, ``"T"``, ``"CS"``, ``"PS"``.
    poles : list of ndarray or None
        Closed-loop poles per variant (delay-free loops), else ``None``.
    prefilter_poles : ndarray
        Poles of the prefilter (outside the loop, but on the r paths).
    blocks : tuple
        ``(controller Block, list of plant Blocks, sensor Block)``.
    """

    index: np.ndarray
    tau: float
    paths: dict
    loop_gain: FreqBatch
    closed: dict
    poles: list | None
    prefilter_poles: np.ndarray
    blocks: tuple = field(repr=False, default=())


@dataclass(frozen=True, eq=False)
class Assembly:
    """A controller closed round every variant of a family.

    Attributes
    ----------
    variants : tuple of str
        Variant names in family order.
    dt : float or None
        Sample time of the loop (None: continuous).
    loop : LoopSpec
    groups : tuple of LoopGroup
    """

    variants: tuple
    dt: float | None
    loop: LoopSpec
    groups: tuple

    def scatter(self, per_group: list) -> np.ndarray:
        """Put per-group (V_g,) arrays back into one (V,) array in family order."""
        out = np.empty(len(self.variants), dtype=np.asarray(per_group[0]).dtype)
        for g, vals in zip(self.groups, per_group):
            out[g.index] = vals
        return out


def _interconnect(F: Block, K: Block, Gs: list, H: Block):
    """Rows over the basis [x (N), r, d, n, w] of every loop signal, delay cut at ym, for the
    plants ``Gs`` (blocks of one order) at once.

    Returns ``(N, nf, xdot rows (V, N, N+4), signals dict of rows (V, N+4))``.
    """
    nf, nc, nh = F.order, K.order, H.order
    ng = Gs[0].order
    V = len(Gs)
    N = nf + nc + ng + nh
    of, oc, og, oh = 0, nf, nf + nc, nf + nc + ng
    ir, idd, inn, iw = N, N + 1, N + 2, N + 3
    GA = np.stack([G.A for G in Gs]).reshape(V, ng, ng)
    GB = np.stack([G.B for G in Gs]).reshape(V, ng)
    GBd = np.stack([G.B_d for G in Gs]).reshape(V, ng)
    GC = np.stack([G.C for G in Gs]).reshape(V, ng)
    GD = np.array([G.D for G in Gs], dtype=float)
    GDd = np.array([G.D_d for G in Gs], dtype=float)

    ym = np.zeros(N + 4)
    ym[oh:oh + nh] = H.C
    ym[iw] = H.D
    ym[inn] = 1.0
    e = np.zeros(N + 4)
    e[of:of + nf] = F.C
    e[ir] = F.D
    e -= ym
    u = K.D * e
    u[oc:oc + nc] += K.C
    y = GD[:, None] * u[None, :]
    y[:, idd] += GDd
    y[:, og:og + ng] += GC
    X0 = np.zeros((N, N + 4))
    X0[of:of + nf, of:of + nf] = F.A
    X0[of:of + nf, ir] = F.B
    X0[oc:oc + nc, :] = np.outer(K.B, e)
    X0[oc:oc + nc, oc:oc + nc] += K.A
    X0[oh:oh + nh, iw] = H.B
    X0[oh:oh + nh, oh:oh + nh] += H.A
    X = np.repeat(X0[None], V, axis=0)
    X[:, og:og + ng, :] = GB[:, :, None] * u[None, None, :]
    X[:, og:og + ng, idd] += GBd
    X[:, og:og + ng, og:og + ng] += GA
    return N, nf, X, {"y": y, "e": np.repeat(e[None], V, axis=0),
                      "u": np.repeat(u[None], V, axis=0)}


def _close(rows: np.ndarray, z: np.ndarray, N: int, *, algebraic_tol: float):
    """Substitute w = z (no delay) into rows (V, R, N+4) over [x, r, d, n, w]; z (V, N+4)."""
    denom = 1.0 - z[:, N + 3]
    if np.any(np.abs(denom) < algebraic_tol):
        raise ModelError("algebraic loop: 1 + D_C D_G D_H = 0 (the loop has no dynamics at "
                         "infinite frequency); add a pole or change a feedthrough")
    sub = z.copy()
    sub[:, N + 3] = 0.0
    sub /= denom[:, None]
    out = rows + rows[..., N + 3][..., None] * sub[:, None, :]
    out[..., N + 3] = 0.0
    return out


def _group_matrices(F, K, Gs, H, tau: float, *, algebraic_tol: float):
    N, nf, X, sig = _interconnect(F, K, Gs, H)
    z = sig["y"]
    if tau == 0.0:
        Xc = _close(X, z, N, algebraic_tol=algebraic_tol)
        sigc = {k: _close(v[:, None, :], z, N, algebraic_tol=algebraic_tol)[:, 0]
                for k, v in sig.items()}
        return N, nf, Xc, sigc, z
    if np.any(np.abs(z[:, N + 3]) >= 1.0):
        raise ModelError("the delayed loop has |D_C D_G D_H| >= 1 (a neutral delay system); "
                         "make the loop gain roll off at high frequency")
    return N, nf, X, sig, z


#: Frequency points a grid gains per lightly damped plant pole or zero pair of one variant
#: (41 across the resonance width plus 2 x 11 approaching its damped frequency, see
#: :func:`~ledger.engine.freqresp.frequency_grid`).


def _root_product(x: np.ndarray, R: np.ndarray) -> np.ndarray:
    """``prod_k (x - R[:, k])`` for every row of ``R`` (V, m) at every point of ``x``: (V, len(x)).

    Multiplied factor by factor in the order of the roots, the same operations and order as
    ``numpy.prod(x - R[:, :, None], axis=1)`` without its (V, m, len(x)) temporary."""
    V, m = R.shape
    if m == 0:
        return np.ones((V, x.size), complex)
    out = x[None, :] - R[:, :1]
    for k in range(1, m):
        out *= x[None, :] - R[:, k:k + 1]
    return out


def _build_group(idx, Gs, F, K, H, tau, d_in, d_plant, ts, algebraic_tol) -> LoopGroup:
    N, nf, X, sig, zr = _group_matrices(F, K, Gs, H, tau, algebraic_tol=algebraic_tol)
    col = {"r": N, "d": N + 1, "n": N + 2}
    io = {"r->y": d_in + d_plant, "d->y": d_plant}
    V = len(Gs)
    paths = {}
    r_rows = None
    if tau == 0:   # [C | D] of the r paths: they share A and B, so one time grid serves all
        r_rows = np.stack([np.concatenate([sig[dst][:, :N], sig[dst][:, col["r"]][:, None]], axis=1)
                           for dst in ("y", "e", "u")], axis=1)
    for name in PATHS:
        src, dst = _PATH_IO[name]
        keep = np.arange(N) if src == "r" else np.arange(nf, N)  # prefilter unreachable from d, n
        A = X[:, keep][:, :, keep]
        B = X[:, keep, col[src]]
        Cr = sig[dst][:, keep]
        Dv = sig[dst][:, col[src]]
        if tau > 0:
            paths[name] = SSBatch(A=A, B=B, C=Cr, D=Dv, dt=ts, tau=tau,
                                  Bw=X[:, keep, N + 3], Cz=zr[:, keep], Dz=zr[:, col[src]],
                                  Dw=sig[dst][:, N + 3], Dzw=zr[:, N + 3],
                                  io_delay=io.get(name, 0.0))
        else:
            z0 = np.zeros((V, keep.size))
            paths[name] = SSBatch(A=A, B=B, C=Cr, D=Dv, dt=ts, tau=0.0, Bw=z0, Cz=z0.copy(),
                                  Dz=np.zeros(V), Dw=np.zeros(V), Dzw=np.zeros(V),
                                  io_delay=io.get(name, 0.0),
                                  grid_rows=r_rows if src == "r" else None)
    loop_poles = None
    if tau == 0:
        Aloop = X[:, nf:N, nf:N]
        ev = np.linalg.eigvals(Aloop) if Aloop.shape[1] else np.zeros((V, 0))
        # as one eigvals call per matrix gives them: real when every imaginary part is zero
        loop_poles = [e.real if not np.any(e.imag) else e for e in ev] \
            if np.iscomplexobj(ev) else list(ev)
    same_shape = len({(G.zeros.size, G.poles.size) for G in Gs}) == 1

    def joined(first, plant, last):
        """Per variant: first block's roots, the plant's (``"poles"``/``"zeros"``), last's."""
        if same_shape:
            R = np.stack([getattr(G, plant) for G in Gs]).astype(complex)
            V_ = R.shape[0]
            full = np.concatenate([np.broadcast_to(first.astype(complex), (V_, first.size)), R,
                                   np.broadcast_to(last.astype(complex), (V_, last.size))],
                                  axis=1)
            return list(full)
        return [np.concatenate([first, getattr(G, plant), last]) for G in Gs]

    ol_poles = joined(K.poles, "poles", H.poles)
    ol_zeros = joined(K.zeros, "zeros", H.zeros)
    point = (lambda w: np.exp(1j * np.asarray(w, float) * ts)) if ts else \
        (lambda w: 1j * np.asarray(w, dtype=float))

    if same_shape:
        Zs = np.stack([G.zeros for G in Gs])      # (V, nz)
        Ps = np.stack([G.poles for G in Gs])      # (V, np)
        gains = np.array([G.gain for G in Gs])

    def plant_parts(x):
        """Plant numerator and denominator products (V, len(x)), vectorised when possible."""
        if not same_shape:
            ng, dg = zip(*(G.parts(x) for G in Gs))
            return np.stack(ng), np.stack(dg)
        return gains[:, None] * _root_product(x, Zs), _root_product(x, Ps)


    memo: dict = {}

    def parts(w):
        """Numerator and denominator of L per variant, block by block, delay in the numerator
        (the last few grids are remembered: L, S, T and the refinements of each start from
        the same grid)."""
        w = np.asarray(w, dtype=float)
        key = w.tobytes()
        hit = memo.get(key)
        if hit is None:
            hit = _parts(w)
            if len(memo) >= 4:
                memo.pop(next(iter(memo)))
            memo[key] = hit
        return hit

    def _parts(w):
        x = point(w)
        nk, dk = K.parts(x)
        nh, dh = H.parts(x)
        ng, dg = plant_parts(x)
        num = ng * (nk * nh)[None, :]
        if tau > 0:
            num = num * np.exp(-1j * np.asarray(w, float) * tau)[None, :]
        return num, dg * (dk * dh)[None, :], (nk, dk), (ng, dg)

    def _ratio(a, b):
        zero = b == 0
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            if not zero.any():
                return a / b
            return np.where(zero, complex(np.inf, 0.0), a / np.where(zero, 1, b))

    def L_of(w):
        num, den, _, _ = parts(w)
        return _ratio(num, den)

    def S_of(w):
        num, den, _, _ = parts(w)
        return _ratio(den, den + num)

    def T_of(w):
        num, den, _, _ = parts(w)
        return _ratio(num, den + num)

    def CS_of(w):
        num, den, (nk, dk), _ = parts(w)
        return _ratio(den / dk[None, :] * nk[None, :], den + num)

    def PS_of(w):
        num, den, _, (ng, dg) = parts(w)
        return _ratio(den / dg * ng, den + num)

    origin = 1.0 if ts else 0.0
    dc = np.empty(V, dtype=complex)
    if same_shape and ol_poles[0].size:
        P = np.stack(ol_poles)
        at_origin = (np.min(np.abs(P - origin), axis=1)
                     < 1e-9 * np.maximum(1.0, np.max(np.abs(P), axis=1)))
    else:
        at_origin = np.array([bool(p.size) and bool(
            np.min(np.abs(p - origin)) < 1e-9 * max(1.0, np.max(np.abs(p)))) for p in ol_poles],
            dtype=bool).reshape(V)
    dc[at_origin] = complex(np.inf, 0.0)
    if not at_origin.all():
        dc[~at_origin] = L_of(np.array([0.0]))[~at_origin, 0]
    cl_poles = loop_poles if loop_poles is not None else \
        [np.concatenate([p, z]) for p, z in zip(ol_poles, ol_zeros)]
    closed = {
        "S": ClosedLoopResponse(S_of, ts, cl_poles, ol_poles),
        "T": ClosedLoopResponse(T_of, ts, cl_poles, ol_zeros),
        "CS": ClosedLoopResponse(CS_of, ts, cl_poles,
                                 joined(K.zeros, "poles", H.poles)),
        "PS": ClosedLoopResponse(PS_of, ts, cl_poles,
                                 joined(K.poles, "zeros", H.poles)),
    }
    fb = FreqBatch(evaluate=L_of, dt=ts, poles=ol_poles, zeros=ol_zeros, dc=dc)
    return LoopGroup(index=idx, tau=float(tau), paths=paths, loop_gain=fb, closed=closed,
                     poles=loop_poles, prefilter_poles=F.poles, blocks=(K, Gs, H))
