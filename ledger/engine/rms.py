"""rms budgets from noise and disturbance spectra: the variance of the output, the measured
error and the control effort per source (:mod:`ledger.engine.spectra`), batched over the
variants of a group.

The loop is closed with the reference at rest and three inputs (sensor noise ``n``, input
disturbance ``d``, output disturbance ``do``)::

    v = u + d,  y = G v + do,  ym = H y + n,  e = -ym,  u = K e

(delays as in :mod:`ledger.engine.loop`; digital loops carry them in the state).  Outputs:
``y`` (the output about its set point: the tracking error for a reference at rest), ``e``
(the measured error the controller sees, noise included) and ``u`` (the effort).

Rational spectra are exact (variance ``= q/2 * C P C^T`` with ``A P + P A^T + B B^T = 0`` of
the loop and shaping filter in series, continuous; digital: ``q/(2 Ts) (C P C^T + D D^T)`` with
``P = A P A^T + B B^T``).  A continuous path with a direct feedthrough of white noise has an
infinite variance (``inf``).  Tabulated spectra are integrated, ``int |H(j 2 pi f)|^2 Phi(f) df``,
by composite Simpson's rule on a grid uniform in ``ln f`` between every two rows of the table
(uniform in ``f`` on an interval starting at 0 Hz), ``points_per_decade`` nodes a decade,
doubled until the error estimate ``|S_h - S_2h| / 15`` is below ``rtol`` of the value.
Sources are independent: variances add.  See docs/metrics.md (rms budgets).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import ComputeError, ModelError, UnstableLoopError
from .spectra import SOURCES, Spectrum, psd_at

__all__ = ["OUTPUTS", "NoiseLoop", "noise_loop", "source_variance", "path_gain2",
           "SourceBudget", "RmsBudget", "rms_budget", "RmsCurve", "rms_curve",
           "DEFAULT_BANDS"]

#: Outputs of a noise loop, in the order of its rows.
OUTPUTS = ("y", "e", "u")
#: Default band edges of the contribution table, Hz (decades).
DEFAULT_BANDS = (1.0, 10.0, 100.0, 1000.0)


@dataclass(frozen=True, eq=False)
class NoiseLoop:
    """The closed loop from the sources (:data:`~ledger.engine.spectra.SOURCES` order) to the
    outputs (:data:`OUTPUTS` order) for the variants of one group: ``A (V, N, N)``,
    ``B (V, N, 3)``, ``C (V, 3, N)``, ``D (V, 3, 3)``; ``dt`` None (continuous) or the sample
    time."""

    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    D: np.ndarray
    dt: float | None

    def subset(self, m) -> "NoiseLoop":
        return NoiseLoop(self.A[m], self.B[m], self.C[m], self.D[m], self.dt)

    @property
    def nvar(self) -> int:
        return self.A.shape[0]


def noise_loop(F, K, Gs, H, tau: float, dt, *, algebraic_tol: float = 1e-12) -> NoiseLoop:
    """Close controller ``K`` round the plant blocks ``Gs`` (one order) with sensor ``H``;
    the inputs are the three sources and the outputs ``y, e, u``.

    Raises
    ------
    ComputeError
        A continuous loop with a delay (its variance needs the delay equation; give the loop
        as digital or without a delay).
    """
    from .closedloop import _close, _interconnect

    if tau > 0:
        raise ComputeError("rms budgets need a delay-free continuous loop or a digital loop "
                           f"(this loop has a {tau:g} s delay)")
    N, nf, X, sig = _interconnect(F, K, Gs, H)
    V = X.shape[0]
    ido = N + 4
    pad = np.zeros((V, 1))
    X = np.concatenate([X, np.zeros((V, N, 1))], axis=2)
    y = np.concatenate([sig["y"], pad], axis=1)
    e = np.concatenate([sig["e"], pad], axis=1)
    u = np.concatenate([sig["u"], pad], axis=1)
    z = y.copy()
    z[:, ido] = 1.0          # the sensor sees y + do
    yt = z.copy()            # output: plant output plus output disturbance
    Xc = _close(X, z, N, algebraic_tol=algebraic_tol)
    rows = _close(np.stack([yt, e, u], axis=1), z, N, algebraic_tol=algebraic_tol)
    keep = np.arange(nf, N)
    cols = [N + 2, N + 1, ido]          # n, d, do -> SOURCES order
    A = Xc[:, keep][:, :, keep]
    B = Xc[:, keep][:, :, cols]
    C = rows[:, :, keep]
    D = rows[:, :, cols]
    return NoiseLoop(A, B, C, D, dt)


def _shaping(spec: Spectrum, dt):
    from .blocks import make_block

    W = make_block(1.0 if spec.shaping is None else spec.shaping,
                   f"{spec.source} shaping filter")
    if dt is None and W.dt not in (None, "any"):
        raise ModelError(f"{spec.source} shaping filter is discrete but the loop is "
                         "continuous; give it in s")
    if dt is not None and W.dt not in ("any",) and (W.dt is None or W.dt is True
                                                     or not math.isclose(W.dt, dt)):
        raise ModelError(f"{spec.source} shaping filter must be in z with the loop's sample "
                         f"time {dt} s (the source is read at the sample instants)")
    p = np.asarray(W.poles)
    if p.size and (np.any(np.abs(p) >= 1.0) if dt else np.any(p.real >= 0.0)):
        raise ModelError(f"{spec.source} shaping filter has a pole on or outside the "
                         "stability boundary; a stationary spectrum needs a stable filter")
    return W


def _rational_variance(nl: NoiseLoop, out: int, src: int, spec: Spectrum) -> np.ndarray:
    from scipy.linalg import solve_continuous_lyapunov, solve_discrete_lyapunov

    W = _shaping(spec, nl.dt)
    q = float(spec.intensity)
    V, N = nl.A.shape[0], nl.A.shape[1]
    nw = W.order
    res = np.empty(V)
    for j in range(V):
        b = nl.B[j, :, src]
        c = nl.C[j, out, :]
        d = nl.D[j, out, src]
        Aa = np.zeros((N + nw, N + nw))
        Aa[:N, :N] = nl.A[j]
        Aa[N:, N:] = W.A
        Aa[:N, N:] = np.outer(b, W.C)
        Ba = np.concatenate([b * W.D, np.reshape(W.B, -1)])
        Ca = np.concatenate([c, d * np.reshape(W.C, -1)])
        Da = d * W.D
        if q == 0.0:
            res[j] = 0.0
            continue
        if nl.dt is None:
            if Da != 0.0:
                res[j] = math.inf  # white noise straight through: infinite variance
                continue
            P = solve_continuous_lyapunov(Aa, -np.outer(Ba, Ba))
            res[j] = 0.5 * q * float(Ca @ P @ Ca)
        else:
            P = solve_discrete_lyapunov(Aa, np.outer(Ba, Ba))
            res[j] = q / (2.0 * nl.dt) * (float(Ca @ P @ Ca) + Da * Da)
    return np.maximum(res, 0.0)


def path_gain2(nl: NoiseLoop, out: int, src: int, f: np.ndarray) -> np.ndarray:
    """``|H(j 2 pi f)|^2`` (digital: at ``exp(j 2 pi f Ts)``) of the path from source ``src``
    to output ``out``, per variant: (V, len(f))."""
    f = np.asarray(f, float)
    V, N = nl.A.shape[0], nl.A.shape[1]
    out_arr = np.empty((V, f.size))
    if N == 0:
        out_arr[:] = nl.D[:, out, src][:, None] ** 2
        return out_arr
    w = 2.0 * math.pi * f
    x = np.exp(1j * w * nl.dt) if nl.dt else 1j * w
    step = max(1, int(4_000_000 // max(1, V * N * N)))
    I = np.eye(N)
    b = nl.B[:, :, src]
    c = nl.C[:, out, :]
    for s0 in range(0, f.size, step):
        xs = x[s0:s0 + step]
        M = xs[None, :, None, None] * I[None, None] - nl.A[:, None]
        sol = np.linalg.solve(M, np.broadcast_to(b[:, None, :, None], M.shape[:3] + (1,)))
        h = np.einsum("vn,vfn->vf", c, sol[..., 0]) + nl.D[:, out, src][:, None]
        out_arr[:, s0:s0 + step] = np.abs(h) ** 2
    return out_arr


def _interval_nodes(a: float, b: float, m: int):
    """Nodes and Simpson weights (fine: m intervals; coarse: m/2) of int_a^b g(f) df."""
    if a <= 0:
        f = np.linspace(a, b, m + 1)
        jac = np.full(m + 1, (b - a) / m)
    else:
        u = np.linspace(math.log(a), math.log(b), m + 1)
        f = np.exp(u)
        f[0], f[-1] = a, b
        jac = f * (u[1] - u[0])
    wf = np.ones(m + 1)
    wf[1:-1:2], wf[2:-1:2] = 4.0, 2.0
    wc = np.zeros(m + 1)               # coarse Simpson on every other node (m % 4 == 0)
    wc[2:-1:4], wc[4:-1:4] = 4.0, 2.0
    wc[0] = wc[-1] = 1.0
    return f, jac * wf / 3.0, jac * 2.0 * wc / 3.0


def _table_grid(spec: Spectrum, ppd: float, fmax: float):
    F = np.asarray(spec.frequencies, float)
    F = F[F < fmax]
    if F.size == 0:
        return None
    edges = list(F)
    if edges[-1] < spec.frequencies[-1] and fmax < math.inf:
        edges.append(fmax)
    if len(edges) < 2:
        return None
    fs, wf, wc = [], [], []
    for a, b in zip(edges[:-1], edges[1:]):
        span = math.log10(b / a) if a > 0 else 1.0
        m = max(4, 4 * math.ceil(ppd * span / 4))
        f, w1, w2 = _interval_nodes(a, b, m)
        fs.append(f)
        wf.append(w1)
        wc.append(w2)
    return np.concatenate(fs), np.concatenate(wf), np.concatenate(wc)


def _table_variance(nl: NoiseLoop, out: int, src: int, spec: Spectrum, *, rtol: float,
                    points_per_decade: float, max_points_per_decade: float):
    fmax = 0.5 / nl.dt if nl.dt else math.inf
    ppd = float(points_per_decade)
    V = nl.nvar
    while True:
        g = _table_grid(spec, ppd, fmax)
        if g is None:
            return np.zeros(V), np.zeros(V)
        f, wf, wc = g
        integrand = path_gain2(nl, out, src, f) * psd_at(spec, f)[None, :]
        fine = integrand @ wf
        coarse = integrand @ wc
        err = np.abs(fine - coarse) / 15.0
        if np.all(err <= rtol * np.maximum(np.abs(fine), 1e-300)) or \
                ppd * 2 > max_points_per_decade:
            return np.maximum(fine, 0.0), err
        ppd *= 2


def source_variance(nl: NoiseLoop, out: str, spec: Spectrum, *, rtol: float = 1e-8,
                    points_per_decade: float = 64, max_points_per_decade: float = 8192):
    """Variance of output ``out`` driven by ``spec``, per variant, and its error estimate
    (0 for rational spectra, exact to rounding).

    Returns
    -------
    (variance, error) : ndarrays (V,), squared output units
    """
    o = OUTPUTS.index(out)
    s = SOURCES.index(spec.source)
    if spec.kind == "rational":
        return _rational_variance(nl, o, s, spec), np.zeros(nl.nvar)
    return _table_variance(nl, o, s, spec, rtol=rtol, points_per_decade=points_per_decade,
                           max_points_per_decade=max_points_per_decade)


# --------------------------------------------------------------------------- family views

@dataclass(frozen=True)
class SourceBudget:
    """One source's share: variance per variant (squared output unit) and the estimated
    integration error of it (0 for a rational spectrum)."""

    source: str
    kind: str
    label: str
    variance: np.ndarray
    error: np.ndarray


@dataclass(frozen=True)
class RmsBudget:
    """Variances of one output per source over a family (see :func:`rms_budget`)."""

    output: str
    variants: tuple
    sources: tuple

    @property
    def variance(self) -> np.ndarray:
        """Combined variance per variant (independent sources: the powers add)."""
        return np.sum([s.variance for s in self.sources], axis=0) if self.sources else \
            np.zeros(len(self.variants))

    @property
    def rms(self) -> np.ndarray:
        return np.sqrt(self.variance)

    def worst_index(self) -> int:
        return int(np.argmax(self.variance))


def _plans(family, controller, loop):
    from .loop import plan

    pl = plan(family, controller, loop)
    F, K, H = pl.blocks
    for gp in pl.groups:
        g = pl.build(gp)
        nl = noise_loop(F, K, g.blocks[1], H, g.tau, pl.dt)
        _check_stable(nl, [pl.variants[i] for i in g.index])
        yield g.index, nl


def _check_stable(nl: NoiseLoop, names) -> None:
    """A stationary variance needs a stable closed loop."""
    if nl.A.shape[1] == 0:
        return
    ev = np.linalg.eigvals(nl.A)
    bad = np.any(np.abs(ev) >= 1.0, axis=1) if nl.dt else np.any(ev.real >= 0.0, axis=1)
    if np.any(bad):
        raise UnstableLoopError(f"the closed loop of variant {names[int(np.argmax(bad))]!r} "
                                "is unstable: no stationary rms exists")


def rms_budget(family, controller, loop, *, output: str = "y") -> RmsBudget:
    """Per source and variant, the variance of ``output`` (``"y"``, ``"e"`` or ``"u"``) under
    the loop's spectra (``loop.spectra``).  Variants must have a stable closed loop (an
    unstable one has no stationary variance: check ``stable`` first)."""
    from .types import PlantFamily

    if not isinstance(family, PlantFamily):
        family = PlantFamily.single(family)
    specs = tuple(loop.spectra)
    V = len(family)
    var = {sp.source: np.zeros(V) for sp in specs}
    err = {sp.source: np.zeros(V) for sp in specs}
    for idx, nl in _plans(family, controller, loop):
        for sp in specs:
            v, e = source_variance(nl, output, sp)
            var[sp.source][idx] = v
            err[sp.source][idx] = e
    return RmsBudget(output, family.names, tuple(
        SourceBudget(sp.source, sp.kind, sp.label, var[sp.source], err[sp.source])
        for sp in specs))


@dataclass(frozen=True)
class RmsCurve:
    """Cumulative variance of one output versus frequency for one variant.

    Attributes
    ----------
    frequencies : ndarray (F,)
        Hz, from 0.
    cumulative : dict source -> ndarray (F,)
        Variance from 0 Hz up to each frequency (squared output unit).
    total : dict source -> float
        The exact (rational) or converged (table) variance of each source.
    bands : tuple of (low Hz, high Hz)
    band_variance : dict source -> tuple of float
        Variance in each band (the cumulative curve rescaled to ``total``).
    """

    output: str
    variant: str
    frequencies: np.ndarray
    cumulative: dict
    total: dict
    bands: tuple
    band_variance: dict


def _display_grid(nl: NoiseLoop, specs, bands=(), ppd: float = 200.0) -> np.ndarray:
    roots = np.concatenate([np.linalg.eigvals(nl.A[0]) if nl.A.shape[1] else np.zeros(0)])
    if nl.dt:
        roots = np.log(roots[np.abs(roots) > 1e-12]) / nl.dt
    mags = np.abs(roots[np.abs(roots) > 0]) / (2 * math.pi)
    lo = (mags.min() if mags.size else 1.0) / 1e3
    hi = max([(mags.max() if mags.size else 1.0) * 1e3] + [10.0 * float(b) for b in bands])
    for sp in specs:
        if sp.kind == "table":
            fr = np.asarray(sp.frequencies, float)
            lo = min(lo, fr[fr > 0].min() if np.any(fr > 0) else lo)
            hi = max(hi, fr.max())
    if nl.dt:
        hi = min(hi, 0.5 / nl.dt)
        lo = min(lo, hi / 1e4)
    n = max(50, int(ppd * math.log10(hi / lo)))
    f = np.concatenate([[0.0], np.logspace(math.log10(lo), math.log10(hi), n)])
    # a table's rows are nodes, its ends with a node just outside: nothing spills past them
    for sp in specs:
        if sp.kind == "table":
            fr = np.asarray(sp.frequencies, float)
            f = np.concatenate([f, fr, [fr[0] * (1 - 1e-9), fr[-1] * (1 + 1e-9)]])
    f = np.unique(f[(f >= 0) & (f <= hi)])
    return f


def rms_curve(family, controller, loop, *, output: str = "y", variant: int = 0,
              bands=DEFAULT_BANDS) -> RmsCurve:
    """The cumulative variance versus frequency and the variance per band of one variant
    (index into the family), by source.  Band edges in Hz; the bands are ``[0, e1], [e1, e2],
    ..., [en, inf)``.  Cumulative curves are trapezoid sums on a log grid; band values rescale
    them to each source's total so that the bands add up to it."""
    from .loop import plan
    from .types import PlantFamily

    if not isinstance(family, PlantFamily):
        family = PlantFamily.single(family)
    sub = PlantFamily((family.variants[variant],))
    pl = plan(sub, controller, loop)
    F, K, H = pl.blocks
    g = pl.build(pl.groups[0])
    nl = noise_loop(F, K, g.blocks[1], H, g.tau, pl.dt)
    _check_stable(nl, sub.names)
    specs = tuple(loop.spectra)
    f = _display_grid(nl, specs, bands)
    o = OUTPUTS.index(output)
    cum, tot, band_var = {}, {}, {}
    edges = [0.0] + [float(b) for b in bands] + [math.inf]
    band_list = tuple(zip(edges[:-1], edges[1:]))
    for sp in specs:
        s = SOURCES.index(sp.source)
        gain = path_gain2(nl, o, s, f)[0]
        if sp.kind == "table":
            phi = psd_at(sp, f)
        else:
            W = _shaping(sp, nl.dt)
            x = np.exp(2j * math.pi * f * nl.dt) if nl.dt else 2j * math.pi * f
            phi = float(sp.intensity) * np.abs(W(x)) ** 2
        dens = gain * phi
        c = np.concatenate([[0.0], np.cumsum(0.5 * (dens[1:] + dens[:-1]) * np.diff(f))])
        total = float(source_variance(nl, output, sp)[0][0])
        cum[sp.source] = c
        tot[sp.source] = total
        scale = total / c[-1] if c[-1] > 0 and math.isfinite(total) else 1.0
        at = [float(np.interp(min(e, f[-1]), f, c)) * scale for e in edges]
        band_var[sp.source] = tuple(max(0.0, b - a) for a, b in zip(at[:-1], at[1:]))
    return RmsCurve(output, family.names[variant], f, cum, tot, band_list, band_var)


# --------------------------------------------------------------------------- the metric kernel

#: Largest accepted relative integration error estimate of a tabulated source in a metric.
TABLE_ACCEPT_RTOL = 1e-4


def kernel(ctx, settings: dict, output: str) -> np.ndarray:
    """``rms_error`` / ``rms_effort`` over the variants of a group context
    (:class:`~ledger.engine.kernels._GroupContext`): ``sigmas`` x the rms of ``output`` under
    the chosen source(s)."""
    loop = ctx.asm.loop
    specs = tuple(loop.spectra)
    src = settings.get("source", "all")
    if src != "all":
        specs = tuple(sp for sp in specs if sp.source == src)
    if not specs:
        what = "no spectra" if src == "all" else f"no {src} spectrum"
        raise ComputeError(f"the loop has {what} recorded; record one with "
                           "'loopledger loop spectrum' (or LoopSpec(spectra=...))")
    if output == "y" and settings.get("error") == "measured":
        output = "e"

    def build():
        F, K, H = ctx.asm.blocks
        g = ctx.g
        Gs = [g.blocks[1][j] for j in np.flatnonzero(ctx.m)]
        return noise_loop(F, K, Gs, H, g.tau, ctx.asm.dt)

    nl = ctx.cached("noise_loop", build)
    total = np.zeros(nl.nvar)
    for sp in specs:
        v, e = ctx.cached(("rms_var", output, sp.source), lambda sp=sp: source_variance(
            nl, output, sp))
        bad = e > TABLE_ACCEPT_RTOL * np.maximum(v, 1e-300)
        if np.any(bad & np.isfinite(v)):
            raise ComputeError(f"the {sp.source} table could not be integrated to "
                               f"{TABLE_ACCEPT_RTOL:g} relative (estimated error "
                               f"{float(np.max(e / np.maximum(v, 1e-300))):.2g}); give the "
                               "table more rows near the loop's resonances")
        total = total + v
    return float(settings.get("sigmas", 1.0)) * np.sqrt(total)
