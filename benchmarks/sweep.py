"""Family sweep: the engine's batched ``measure_family`` against the per-variant loop a user
would write with python-control, and both against closed forms.

Nothing here asserts on time; it returns figures for ``run.py`` to print.
"""

from __future__ import annotations

import cProfile
import math
import pstats
import time
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import brentq

from . import scenario as S

__all__ = ["SweepFigures", "engine_sweep", "baseline_sweep", "disagreement",
           "closed_form_checks", "profile_split", "child_sweep"]


@dataclass(frozen=True)
class SweepFigures:
    """Times in seconds and per-variant values by metric name."""

    variants: int
    seconds: float
    values: dict = field(repr=False)
    cpu_seconds: float = math.nan
    errors: dict = field(default_factory=dict)


def engine_sweep(fam, *, repeats: int = 1) -> SweepFigures:
    """Time ``measure_family`` over the family with the standard suite (best of ``repeats``)."""
    from ledger.engine.loop import LoopSpec
    from ledger.engine.measure import measure_family
    from ledger.systems import parse_model

    C = parse_model(S.CONTROLLER).system
    best, best_cpu, res = math.inf, math.inf, None
    for _ in range(repeats):
        t0, c0 = time.perf_counter(), time.process_time()
        res = measure_family(fam, C, LoopSpec(), list(S.SUITE))
        best = min(best, time.perf_counter() - t0)
        best_cpu = min(best_cpu, time.process_time() - c0)
    values, errors = {}, {}
    for name in S.SUITE:
        r = res.get(name)
        values[name] = np.asarray(r.values, float)
        if r.variant_errors:
            errors[name] = r.error
    return SweepFigures(len(fam), best, values, errors=errors, cpu_seconds=best_cpu)


def baseline_one(C, G, w_grid, t=None, *, grid_check: bool = True):
    """The straightforward per-variant python-control loop for one variant.

    ``t``: time vector for ``step_info``/``step_response`` (default: python-control's own;
    ``benchmarks/hard.py`` gives one because the automatic vector fails in ``step_info`` on
    order-16 loops, counted there as NaN).  ``grid_check`` adds ``_grid_check``, the agreement
    of a direct |T|, |S| evaluation with ``frequency_response`` (extra work, off for timings
    of the hard families)."""
    import control

    L = C * G
    T = control.feedback(L, 1)
    Sy = control.feedback(control.tf([1], [1]), L)
    U = control.feedback(C, G)
    poles = T.poles()
    zeta = np.where(np.abs(poles) > 0, -poles.real / np.abs(poles), 1.0)
    try:
        info = control.step_info(T) if t is None else control.step_info(T, T=t)
    except (IndexError, ValueError):   # python-control fails on ill-conditioned high orders
        if t is None:
            raise
        info = {"RiseTime": math.nan, "SettlingTime": math.nan, "Overshoot": math.nan}
    _, yu = control.step_response(U) if t is None else control.step_response(U, T=t)
    gm, pm, _sm, _wpc, wgc, _wms = control.stability_margins(L)
    st_diff = np.abs(Sy(1j * w_grid) - T(1j * w_grid))
    fr_S = control.frequency_response(Sy, w_grid)
    fr_T = control.frequency_response(T, w_grid)
    out = {
        "stable": float(np.all(poles.real < 0)),
        "min_damping": float(np.min(zeta)),
        "rise_time": float(info["RiseTime"]),
        "settling_time": float(info["SettlingTime"]),
        "overshoot": float(info["Overshoot"]),
        "peak_effort": float(np.max(np.abs(yu))),
        "gain_margin": 20 * math.log10(gm) if np.isfinite(gm) else math.inf,
        "phase_margin": float(pm),
        "delay_margin": math.radians(pm) / wgc if np.isfinite(wgc) and wgc > 0 else math.inf,
        "gain_crossover": float(wgc),
        "bandwidth": float(control.bandwidth(T)),
        "peak_sensitivity": float(np.max(np.abs(np.squeeze(fr_S.magnitude)))),
        "peak_complementary_sensitivity": float(np.max(np.abs(np.squeeze(fr_T.magnitude)))),
        "disk_margin": 2.0 / float(np.max(st_diff)),
    }
    if grid_check:
        mag_T = np.abs(T(1j * w_grid))
        mag_S = np.abs(Sy(1j * w_grid))
        out["_grid_check"] = float(np.max(np.abs(mag_T - np.squeeze(fr_T.magnitude)))
                                   + np.max(np.abs(mag_S - np.squeeze(fr_S.magnitude))))
    return out


def baseline_sweep(fam, *, limit: int | None = None) -> SweepFigures:
    """Per-variant python-control loop over the family (or its first ``limit`` variants).

    Frequency-domain peaks are gridded maxima on 2,000 log-spaced points from 0.1 to 1e5
    rad/s (what a user would write), not refined."""
    from ledger.systems import parse_model

    C = parse_model(S.CONTROLLER).system
    variants = fam.variants[:limit] if limit else fam.variants
    w_grid = np.logspace(-1, 5, 2000)
    rows = []
    t0, c0 = time.perf_counter(), time.process_time()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for v in variants:
            rows.append(baseline_one(C, v.system, w_grid))
    dt, cpu = time.perf_counter() - t0, time.process_time() - c0
    values = {k: np.array([r[k] for r in rows], float) for k in rows[0] if not k.startswith("_")}
    return SweepFigures(len(variants), dt, values, cpu_seconds=cpu)


def disagreement(a: SweepFigures, b: SweepFigures) -> dict:
    """Per metric: largest relative disagreement |a - b| / max(|b|, 1e-12) over the variants
    both computed (finite in both, or both infinite with the same sign counts as agreement)."""
    out = {}
    n = min(a.variants, b.variants)
    for name in S.SUITE:
        x, y = a.values[name][:n], b.values[name][:n]
        both_inf = np.isinf(x) & np.isinf(y) & (np.sign(x) == np.sign(y))
        fin = np.isfinite(x) & np.isfinite(y)
        mismatch = int(np.sum(~(fin | both_inf)))
        rel = np.abs(x[fin] - y[fin]) / np.maximum(np.abs(y[fin]), 1e-12)
        worst = float(np.max(rel)) if rel.size else 0.0
        where = int(np.flatnonzero(fin)[np.argmax(rel)]) if rel.size else -1
        out[name] = {"rel": worst, "variant": where, "finite_mismatch": mismatch}
    return out


# -- closed forms ---------------------------------------------------------------------------

def _L_analytic(w, p, g, full: bool):
    """L(jw) of the PID with filter times the plant, from the parameters (no python-control)."""
    s = 1j * w
    C = g["kp"] + g["ki"] / s + g["kd"] * s / (g["tf"] * s + 1)
    G = p["K"] / (s * (p["tau_m"] * s + 1))
    if full:
        G = G / (p["tau_e"] * s + 1)
    return C * G


def _phase_deg(w, p, g, full: bool):
    """Continuous phase of L(jw) in degrees (sum of the factors' angles, no wrapping)."""
    s = 1j * w
    C = g["kp"] + g["ki"] / s + g["kd"] * s / (g["tf"] * s + 1)   # Re C > 0: angle in (-90, 90)
    ph = np.degrees(np.angle(C)) - 90.0 - np.degrees(np.arctan(p["tau_m"] * w))
    if full:
        ph -= np.degrees(np.arctan(p["tau_e"] * w))
    return ph


def closed_form_checks(fam, eng: SweepFigures, *, subset: int = 40) -> dict:
    """Engine values against independent closed forms.

    1. Proportional control kp on the reduced nominal plant: the gain crossover solves
       wc^2 sqrt(1 + (tau wc)^2)^2 = (kp K)^2, i.e. wc^2 = (sqrt(1 + 4 (tau kp K)^2) - 1)
       / (2 tau^2), PM = 90 - atan(tau wc) deg, GM = inf, delay margin = PM[rad] / wc.
       Source: the second-order loop K/(s(tau s+1)); Ogata, Modern Control Engineering,
       frequency-response chapter (from memory).
    2. The PID revision on ``subset`` variants: crossover by brentq on the analytic
       log|L(jw)| = 0, PM = 180 + arg L; for the full-order model the phase crossover by
       brentq on arg L = -180 deg and GM = -20 log10|L| there.

    Returns the largest relative error per quantity.
    """
    from ledger.engine.measure import measure
    from ledger.systems import parse_model

    out: dict = {}
    # 1. proportional control, closed form
    K, tau, kp = 180.0, 0.03, 0.8
    G = parse_model(S.PLANT_TEXT, {"K": K, "tau_m": tau}).system
    m = measure(G, kp, ["phase_margin", "gain_crossover", "delay_margin", "gain_margin"])
    wc = math.sqrt((math.sqrt(1 + 4 * (tau * kp * K) ** 2) - 1) / (2 * tau ** 2))
    pm = 90 - math.degrees(math.atan(tau * wc))
    out["P: phase_margin"] = abs(m["phase_margin"] - pm) / pm
    out["P: gain_crossover"] = abs(m["gain_crossover"] - wc) / wc
    out["P: delay_margin"] = abs(m["delay_margin"] - math.radians(pm) / wc) / (math.radians(pm) / wc)
    out["P: gain_margin is inf"] = 0.0 if math.isinf(m["gain_margin"]) else 1.0

    # 2. the PID revision, variant by variant, brentq on the analytic L(jw)
    g = S.CONTROLLER_GAINS
    idx = list(range(min(subset - 1, len(fam) - 1))) + [len(fam) - 1]   # ... + full-order
    e_pm = e_wc = e_gm = 0.0
    for i in idx:
        v = fam.variants[i]
        full = v.kind == "fidelity"
        p = dict(v.params) if v.params else {k: (x["nominal"] if isinstance(x, dict) else x)
                                             for k, x in S.PARAMS.items()}
        f = lambda w: math.log(abs(_L_analytic(w, p, g, full)))   # noqa: E731
        wc = brentq(f, 1.0, 1e4, xtol=1e-14, rtol=1e-15, maxiter=200)
        pm = 180.0 + float(_phase_deg(wc, p, g, full))
        e_pm = max(e_pm, abs(eng.values["phase_margin"][i] - pm) / abs(pm))
        e_wc = max(e_wc, abs(eng.values["gain_crossover"][i] - wc) / wc)
        if full:
            ph = lambda w: float(_phase_deg(w, p, g, True)) + 180.0   # noqa: E731
            wp = brentq(ph, wc, 1e6, xtol=1e-12, rtol=1e-15, maxiter=200)
            gm = -20 * math.log10(abs(_L_analytic(wp, p, g, True)))
            e_gm = max(e_gm, abs(eng.values["gain_margin"][i] - gm) / abs(gm))
    out.update(_dense_step_checks(fam, eng))
    out[f"PID, {len(idx)} variants: phase_margin"] = e_pm
    out[f"PID, {len(idx)} variants: gain_crossover"] = e_wc
    out["PID, full-order: gain_margin"] = e_gm
    return out


def _closed_loop_poly(p: dict, g: dict, full: bool):
    """Numerator and denominator of T = CG/(1+CG) from the parameters (numpy polynomials;
    no python-control, no engine)."""
    P = np.polynomial.polynomial
    # C = [kd s^2 + kp s (tf s + 1) + ki (tf s + 1)] / [s (tf s + 1)]   (ascending powers)
    c_num = P.polyadd(P.polyadd([0, 0, g["kd"]], P.polymul([0, g["kp"]], [1, g["tf"]])),
                      P.polymul([g["ki"]], [1, g["tf"]]))
    c_den = P.polymul([0, 1], [1, g["tf"]])
    g_den = P.polymul([0, 1], [1, p["tau_m"]])
    if full:
        g_den = P.polymul(g_den, [1, p["tau_e"]])
    num = P.polymul(c_num, [p["K"]])
    den = P.polyadd(P.polymul(c_den, g_den), num)
    return num[::-1], den[::-1]      # descending powers for scipy.signal


def _dense_step_checks(fam, eng: SweepFigures, *, points: int = 400_001,
                       horizon: float = 0.4) -> dict:
    """Rise time (10-90 %), 2 % settling time and overshoot of the nominal, the 4 corners and
    the full-order model from scipy.signal.step on a dense grid (dt = 1 us), crossings by linear
    interpolation, the peak by a parabola through the three largest samples.  Independent of
    the engine and of python-control; interpolation error is far below 1e-6 relative."""
    from scipy import signal

    g = S.CONTROLLER_GAINS
    t = np.linspace(0.0, horizon, points)
    idx = [i for i, v in enumerate(fam.variants) if v.kind in ("nominal", "corner", "fidelity")]
    errs = {"rise_time": 0.0, "settling_time": 0.0, "overshoot": 0.0}
    for i in idx:
        v = fam.variants[i]
        num, den = _closed_loop_poly(dict(v.params), g, v.kind == "fidelity")
        _, y = signal.step(signal.lti(num, den), T=t)
        yf = num[-1] / den[-1]

        def cross(level):
            k = int(np.argmax(y >= level))
            return t[k - 1] + (level - y[k - 1]) * (t[k] - t[k - 1]) / (y[k] - y[k - 1])
        rise = cross(0.9 * yf) - cross(0.1 * yf)
        out_band = np.flatnonzero(np.abs(y - yf) > 0.02 * abs(yf))
        k = out_band[-1]
        lvl = yf + np.sign(y[k] - yf) * 0.02 * abs(yf)
        settle = t[k] + (lvl - y[k]) * (t[k + 1] - t[k]) / (y[k + 1] - y[k])
        m = int(np.argmax(y))
        a, b, c = y[m - 1], y[m], y[m + 1]
        peak = b - (a - c) ** 2 / (8 * (a - 2 * b + c))
        over = 100 * (peak - yf) / abs(yf)
        errs["rise_time"] = max(errs["rise_time"], abs(eng.values["rise_time"][i] - rise) / rise)
        errs["settling_time"] = max(errs["settling_time"],
                                    abs(eng.values["settling_time"][i] - settle) / settle)
        errs["overshoot"] = max(errs["overshoot"], abs(eng.values["overshoot"][i] - over) / over)
    return {f"dense scipy step, {len(idx)} variants: {k}": v for k, v in errs.items()}


# -- where the time goes ----------------------------------------------------------------------

KERNEL_FILES = ("loop.py", "blocks.py", "closedloop.py", "stability.py", "freqresp.py",
                "freqeval.py", "freqsolve.py", "freqgrid.py", "crossings.py", "margins.py",
                "peaks.py", "timeresp.py", "steprefine.py", "timegrid.py", "ssbatch.py",
                "simulation.py", "discretize.py")


def _is_kernel(func, adapter_lines) -> bool:
    filename, line, name = func
    norm = filename.replace("\\", "/")
    if "/ledger/engine/" not in norm:
        return False
    base = norm.rsplit("/", 1)[-1]
    if base in KERNEL_FILES:
        return True
    # kernels.py's per-variant adapter lambdas are called by kernels with kernels below them
    return base == "kernels.py" and name == "<lambda>" and line in adapter_lines


def profile_split(fn, *, top: int = 12) -> dict:
    """Run ``fn()`` under cProfile; attribute time to numeric kernels (functions in
    ``ledger/engine/{loop,blocks,closedloop,stability,freqresp,freqeval,freqsolve,freqgrid,
    crossings,margins,peaks,timeresp,steprefine,timegrid,ssbatch,simulation,discretize}.py``,
    everything they call included) versus the rest (driver, judging, hashing, JSON,
    database, parsing).

    Kernel time = sum over kernel functions of the cumulative time of their calls made from
    non-kernel callers (so nested kernel calls are not counted twice)."""
    import importlib

    M = importlib.import_module("ledger.engine.kernels")
    adapter_lines = {M._sub_eval.__code__.co_firstlineno + 1}
    prof = cProfile.Profile()
    t0 = time.perf_counter()
    prof.enable()
    fn()
    prof.disable()
    wall = time.perf_counter() - t0
    st = pstats.Stats(prof)
    total = st.total_tt
    kernel = 0.0
    entries = {}
    for func, (_cc, _nc, _tt, _ct, callers) in st.stats.items():
        if not _is_kernel(func, adapter_lines):
            continue
        for caller, cstat in callers.items():
            if not _is_kernel(caller, adapter_lines):
                ct = cstat[3]
                kernel += ct
                key = f"{func[0].rsplit('/', 1)[-1]}:{func[2]}"
                entries[key] = entries.get(key, 0.0) + ct
    outside = {}
    numeric = ("/numpy/", "/scipy/", "/control/")
    for func, (_cc, _nc, tt, _ct, _callers) in st.stats.items():
        where = func[0].replace("\\", "/")
        if not _is_kernel(func, adapter_lines) and not any(x in where for x in numeric) \
                and not where.startswith("~"):
            tag = where.split("/ledger/", 1)[-1] if "/ledger/" in where else where.rsplit("/", 1)[-1]
            key = f"{tag}:{func[2]}"
            outside[key] = outside.get(key, 0.0) + tt
    return {
        "wall": wall, "profiled_total": total, "kernel": kernel,
        "outside_share": max(0.0, 1.0 - kernel / total) if total else float("nan"),
        "kernel_entries": sorted(entries.items(), key=lambda kv: -kv[1])[:top],
        "outside_tottime_top": sorted(outside.items(), key=lambda kv: -kv[1])[:top],
    }


def child_sweep(n_variants: int) -> None:
    """Entry point of the memory workload's fresh subprocess: build the family, run the sweep
    once, print the child's own peak RSS (kB) for a cross-check."""
    import resource

    fam = S.family(n_variants)
    fig = engine_sweep(fam)
    print(f"{fig.seconds:.6f} {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss}")
