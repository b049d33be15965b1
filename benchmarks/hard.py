"""Hard benchmark cases: resonant families, plant-order and variant-count sweeps, streaming,
one family on several processes, the per-variant python-control loop and the numpy floor.

Every timed point that reports a peak resident memory runs in a fresh subprocess
(``python benchmarks/run.py --child-family ...``), so that ``ru_maxrss`` is that point's own.
Nothing here asserts on time; it returns figures for ``run.py`` to print.
"""

from __future__ import annotations

import json
import math
import resource
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np

from . import resonant as R
from . import scenario as S
from .sweep import baseline_one

__all__ = ["child_family", "run_point", "baseline_per_variant", "floor", "accuracy",
           "growth_exponent", "verify_workers", "profile"]

RUN = Path(__file__).resolve().parent / "run.py"


def _rss_mb() -> float:
    """Peak resident memory of this process image (``VmHWM``: reset by exec, unlike
    ``ru_maxrss``, which a child started by fork + exec inherits from a large parent)."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _current_rss_mb() -> float:
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return float("nan")


def child_family(n: int, order: int, workers: int = 1, lazy: int = 0) -> None:
    """Entry point of one subprocess point: build the resonant family (``lazy``: variants made
    on access, :func:`~benchmarks.resonant.lazy_family`), measure it once with the benchmark
    suite, print JSON (seconds, CPU seconds of this process and its children, peak RSS,
    resident memory after building the family)."""
    from ledger.engine.loop import LoopSpec
    from ledger.engine.measure import measure_family

    import ledger.engine.timeresp  # noqa: F401 - imports outside the timed part

    fam = R.lazy_family(n, order=order) if lazy else R.family(n, order=order)
    C = R.controller()
    measure_family(R.family(3, order=order, seed=99), C, LoopSpec(), list(S.SUITE))  # warm
    fam_mb = _current_rss_mb()
    t0, c0 = time.perf_counter(), time.process_time()
    res = measure_family(fam, C, LoopSpec(), list(S.SUITE), workers=workers)
    dt, cpu = time.perf_counter() - t0, time.process_time() - c0
    ch = resource.getrusage(resource.RUSAGE_CHILDREN)
    worst = {}
    for m in S.SUITE:
        r = res.get(m)
        worst[m] = None if r.variant_errors else float(r.worst)
    print(json.dumps({"n": n, "order": order, "workers": workers, "seconds": dt,
                      "cpu": cpu + ch.ru_utime + ch.ru_stime, "rss_mb": _rss_mb(),
                      "family_rss_mb": fam_mb, "worst": worst,
                      "errors": sum(bool(res.get(m).variant_errors) for m in S.SUITE)}))


def run_point(n: int, order: int = 4, workers: int = 1, lazy: bool = False) -> dict:
    """One subprocess point (see :func:`child_family`)."""
    cmd = [sys.executable, str(RUN), "--child-family", str(n), str(order), str(workers),
           str(int(lazy))]
    out = subprocess.run(cmd, check=True, capture_output=True, text=True, cwd=str(S.ROOT))
    return json.loads(out.stdout.strip().splitlines()[-1])


def growth_exponent(points: list[dict], lo: int, hi: int) -> float:
    """Least-squares slope of log(seconds) against log(variants) over lo <= n <= hi."""
    sel = [p for p in points if lo <= p["n"] <= hi]
    x = np.log([p["n"] for p in sel])
    y = np.log([p["seconds"] for p in sel])
    return float(np.polyfit(x, y, 1)[0])


# -- the per-variant python-control loop ----------------------------------------------------

def baseline_per_variant(n_slice: int, order: int = 4) -> dict:
    """The per-variant python-control loop (as in ``benchmarks/sweep.py``, with a 4 s,
    4,001-point time vector for the step metrics) on the first ``n_slice`` variants of the
    resonant family: seconds and CPU seconds for the slice, values."""
    fam = R.family(n_slice, order=order)
    C = R.controller()
    w = np.logspace(-1, 5, 2000)
    t = np.linspace(0.0, 4.0, 4001)
    rows = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        baseline_one(C, fam.variants[0].system, w, t, grid_check=False)  # imports, first call
        t0, c0 = time.perf_counter(), time.process_time()
        for v in fam.variants:
            rows.append(baseline_one(C, v.system, w, t, grid_check=False))
        dt, cpu = time.perf_counter() - t0, time.process_time() - c0
    values = {k: np.array([r[k] for r in rows], float) for k in rows[0] if not k.startswith("_")}
    failed = int(np.sum(np.isnan(values["rise_time"])))
    return {"n": n_slice, "seconds": dt, "cpu": cpu, "values": values, "failed": failed}


# -- the floor ------------------------------------------------------------------------------

def floor(n: int, order: int = 4, repeats: int = 3) -> dict:
    """The minimal numpy work for the family, best of ``repeats``: the stacked closed-loop
    eigenvalues, one loop-gain evaluation (Horner, numerator and denominator) on as many
    frequencies as the engine's grid of one variant has, and the step propagation
    x[k+1] = Ad x[k] + Bd u over as many samples as the engine's time grid of one variant
    (the discretisation itself not counted).  Work the engine cannot avoid; it refines
    nothing and computes no metric."""
    from ledger.engine import freqresp, timegrid
    from ledger.engine.loop import assemble

    fam = R.family(n, order=order)
    C = R.controller()
    g1 = assemble(R.family(1, order=order), C).groups[0]
    W = int(freqresp.frequency_grid(g1.loop_gain).size)
    K = int(timegrid.horizon(timegrid.balance(g1.paths["r->y"])).nsamples)
    # closed-loop matrices and the polynomial coefficients of L = C G
    cn, cd = np.asarray(C.num[0][0], float), np.asarray(C.den[0][0], float)
    nums, dens = [], []
    for v in fam.variants:
        nums.append(np.polymul(cn, np.asarray(v.system.num[0][0], float)))
        dens.append(np.polymul(cd, np.asarray(v.system.den[0][0], float)))
    m = max(len(p) for p in dens)
    Nm = np.array([np.pad(p, (m - len(p), 0)) for p in nums])
    Dm = np.array([np.pad(p, (m - len(p), 0)) for p in dens])
    cl = Dm + Nm
    nst = m - 1
    A = np.zeros((n, nst, nst))
    A[:, 0, :] = -cl[:, 1:] / cl[:, :1]
    A[:, np.arange(1, nst), np.arange(nst - 1)] = 1.0
    Ad = np.repeat(np.eye(nst)[None] * 0.999, n, axis=0) + A * 1e-6
    Bd = np.ones((n, nst, 1)) * 1e-3
    x = 1j * np.logspace(-1, 4, W)
    best = {"eig": math.inf, "freq": math.inf, "step": math.inf}
    for _ in range(repeats):
        t0 = time.perf_counter()
        np.linalg.eigvals(A)
        t1 = time.perf_counter()
        num = np.zeros((n, W), complex)
        den = np.zeros((n, W), complex)
        for k in range(m):
            num = num * x[None, :] + Nm[:, k:k + 1]
            den = den * x[None, :] + Dm[:, k:k + 1]
        _ = num / den
        t2 = time.perf_counter()
        xs = np.zeros((n, nst, 1))
        ys = np.empty((n, K))
        for k in range(K):
            xs = Ad @ xs + Bd
            ys[:, k] = xs[:, 0, 0]
        t3 = time.perf_counter()
        best["eig"] = min(best["eig"], t1 - t0)
        best["freq"] = min(best["freq"], t2 - t1)
        best["step"] = min(best["step"], t3 - t2)
    best["total"] = best["eig"] + best["freq"] + best["step"]
    best["grid_points"], best["samples"] = W, K
    return best


# -- accuracy against dense references ------------------------------------------------------

def accuracy(n_subset: int = 8, order: int = 4, baseline: dict | None = None) -> dict:
    """Engine values (and, when given, the per-variant loop's) against references on the first
    ``n_subset`` variants of the resonant family:

    * gain and phase margin, gain crossover: python-control ``stability_margins`` (crossings
      from the polynomial roots of the transfer function);
    * peak |S|, peak |T|: the largest value on 400,000 log-spaced points (1e-2 to 1e5 rad/s)
      refined by ``scipy.optimize.minimize_scalar`` (bounded, xatol 1e-13 relative) between
      the neighbours of the grid maximum;
    * bandwidth: ``scipy.optimize.brentq`` on |T(jw)| = |T(0)| 10^(-3/20) from the first
      dense-grid point below the level;
    * rise time, overshoot, settling time (2 %): ``scipy.signal.step`` of the closed loop on
      2,000,001 points over 4 s, crossings by linear interpolation, the peak by a parabola.

    Returns the largest relative error per metric for the engine and for the baseline."""
    import control
    from scipy import optimize, signal

    from ledger.engine.loop import LoopSpec
    from ledger.engine.measure import measure_family

    fam = R.family(n_subset, order=order)
    C = R.controller()
    res = measure_family(fam, C, LoopSpec(), list(S.SUITE))
    eng = {m: np.asarray(res.get(m).values, float) for m in S.SUITE}
    wd = np.logspace(-2, 5, 400_001)
    ref = {m: np.full(n_subset, np.nan) for m in ("gain_margin", "phase_margin",
                                                  "gain_crossover", "peak_sensitivity",
                                                  "peak_complementary_sensitivity", "bandwidth",
                                                  "rise_time", "overshoot", "settling_time")}
    t = np.linspace(0.0, 4.0, 2_000_001)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for j, v in enumerate(fam.variants):
            L = C * v.system
            gm, pm, _, _, wc, _ = control.stability_margins(L)
            ref["gain_margin"][j] = 20 * math.log10(gm)
            ref["phase_margin"][j] = pm
            ref["gain_crossover"][j] = wc
            Ln = np.asarray(L.num[0][0], float)
            Ld = np.asarray(L.den[0][0], float)
            m_ = max(len(Ln), len(Ld))
            Ln, Ld = np.pad(Ln, (m_ - len(Ln), 0)), np.pad(Ld, (m_ - len(Ld), 0))

            def Sf(w):
                s = 1j * w
                return np.polyval(Ld, s) / np.polyval(Ld + Ln, s)

            def Tf(w):
                s = 1j * w
                return np.polyval(Ln, s) / np.polyval(Ld + Ln, s)

            for name, f in (("peak_sensitivity", Sf), ("peak_complementary_sensitivity", Tf)):
                h = np.abs(f(wd))
                k = int(np.argmax(h))
                r = optimize.minimize_scalar(lambda w: -abs(f(w)), bounds=(wd[k - 1], wd[k + 1]),
                                             method="bounded",
                                             options={"xatol": 1e-13 * wd[k]})
                ref[name][j] = max(-r.fun, h[k])
            t0 = abs(Tf(0.0))
            lvl = t0 * 10 ** (-3 / 20)
            hT = np.abs(Tf(wd))
            k = int(np.argmax(hT < lvl))
            ref["bandwidth"][j] = optimize.brentq(lambda w: abs(Tf(w)) - lvl, wd[k - 1], wd[k],
                                                  xtol=1e-14, rtol=1e-15)
            _, y = signal.step(signal.lti(Ln, Ld + Ln), T=t)
            yf = Ln[-1] / (Ld + Ln)[-1]

            def cross(level):
                i = int(np.argmax(y >= level))
                return t[i - 1] + (level - y[i - 1]) * (t[i] - t[i - 1]) / (y[i] - y[i - 1])
            ref["rise_time"][j] = cross(0.9 * yf) - cross(0.1 * yf)
            i = int(np.argmax(y))
            a, b, c = y[i - 1], y[i], y[i + 1]
            ref["overshoot"][j] = 100 * (b - (a - c) ** 2 / (8 * (a - 2 * b + c)) - yf) / abs(yf)
            out_band = np.flatnonzero(np.abs(y - yf) > 0.02 * abs(yf))
            i = out_band[-1]
            lv = yf + np.sign(y[i] - yf) * 0.02 * abs(yf)
            ref["settling_time"][j] = t[i] + (lv - y[i]) * (t[i + 1] - t[i]) / (y[i + 1] - y[i])
    out = {}
    for m, r in ref.items():
        e = float(np.max(np.abs(eng[m] - r) / np.abs(r)))
        b = math.nan
        if baseline is not None and m in baseline["values"]:
            bv = baseline["values"][m][:n_subset]
            b = float(np.max(np.abs(bv - r) / np.abs(r)))
        out[m] = {"engine": e, "baseline": b}
    return out


# -- verify --workers on one revision -------------------------------------------------------

def verify_workers(tmp: Path, samples: int, repeats: int = 1) -> dict:
    """One revision over a resonant plant of ``samples`` seeded variants, ``verify`` with 1 and
    2 workers in fresh copies of one ledger (best of ``repeats`` each, alternated)."""
    import shutil

    from ledger.api import open_ledger

    src = tmp / "resonant-src.db"
    with open_ledger(src, create=True, author="bench") as lg:
        lg.auto_verify = False
        lg.add_plant("axis", "K/(s*(tau_m*s+1))*lowpass2(wn, zeta)",
                     params={"K": {"nominal": 20.0, "tol": "20 %"},
                             "tau_m": {"nominal": 0.01, "tol": "20 %"},
                             "wn": {"nominal": 2 * math.pi * 40, "tol": "20 %"},
                             "zeta": {"nominal": 0.05, "tol": "20 %"}}, samples=samples, seed=1)
        lg.add_loop("axis-loop", "axis")
        for key, metric, limit in S.REQUIREMENTS:
            lg.add_requirement(key, title=metric, statement=f"{metric} {limit}", metric=metric,
                               limit=limit, loops=["axis-loop"])
        lg.add_revision("axis-loop", R.CONTROLLER_TEXT, rationale="lead and integrator",
                        verify=False)
    best = {1: math.inf, 2: math.inf}
    for r in range(repeats):
        for w in (1, 2):
            dst = tmp / f"resonant-{w}-{r}.db"
            shutil.copy(src, dst)
            from ledger.verification.compute import clear_family_cache
            clear_family_cache()
            with open_ledger(dst, author="bench") as lg:
                t0 = time.perf_counter()
                lg.verify(workers=w)
                best[w] = min(best[w], time.perf_counter() - t0)
    return {"samples": samples, "seconds": best, "speedup": best[1] / best[2]}


def profile(n: int, order: int = 4, top: int = 14) -> dict:
    """cProfile of one ``measure_family`` call on ``n`` resonant variants: the engine
    functions with the largest cumulative and own times."""
    import cProfile
    import pstats

    from ledger.engine.loop import LoopSpec
    from ledger.engine.measure import measure_family

    fam = R.family(n, order=order)
    C = R.controller()
    measure_family(R.family(3, order=order, seed=99), C, LoopSpec(), list(S.SUITE))
    prof = cProfile.Profile()
    prof.enable()
    measure_family(fam, C, LoopSpec(), list(S.SUITE))
    prof.disable()
    st = pstats.Stats(prof)
    cum, own = [], []
    for (fn, _line, name), (_cc, _nc, tt, ct, _callers) in st.stats.items():
        norm = fn.replace("\\", "/")
        if "/ledger/engine/" in norm:
            key = f"{norm.rsplit('/', 1)[-1]}:{name}"
            if name not in ("<lambda>", "<genexpr>", "cached", "_collect", "measure_family",
                            "_measure_group"):
                cum.append((key, ct))
            own.append((key, tt))
    cum.sort(key=lambda kv: -kv[1])
    own.sort(key=lambda kv: -kv[1])
    return {"n": n, "total": st.total_tt, "cumulative": cum[:top], "own": own[:top]}
