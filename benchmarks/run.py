"""loopledger speed and scale benchmark.

Usage::

    python benchmarks/run.py                 # the full run (several minutes)
    python benchmarks/run.py --quick         # a smoke run of every workload, about two minutes
    python benchmarks/run.py --write-docs    # full run, then rewrite docs/performance.md

Every workload is built from seeded data and the invented pipette scenario
(``benchmarks/scenario.py``); figures and ratios are measured side by side in one run and
printed.  It is a benchmark, not a test: it never asserts on time.
"""

from __future__ import annotations

import argparse
import math
import os
import platform
import subprocess
import sys
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

if __package__ in (None, ""):          # run as a script: make ``benchmarks`` importable
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
    __package__ = "benchmarks"

from benchmarks import scenario as S  # noqa: E402

__all__ = ["main", "machine", "Row"]

FULL = dict(variants=1000, baseline=200, small_revisions=200, small_samples=10,
            parallel_revisions=40, parallel_repeats=3, slow_repeats=3, ui_timeout=90.0,
            scale_revisions=10_000, scale_requirements=100,
            resonant=(1000, 10_000), count_sweep=(10, 100, 1000, 10_000), orders=(2, 4, 8, 16),
            order_sizes=(100, 1000), order_baselines=True, baseline_slice=50,
            stream=100_000, cores=10_000, verify_samples=10_000, accuracy_subset=8,
            cluster=(200, 1000))
QUICK = dict(variants=100, baseline=30, small_revisions=12, small_samples=4,
             parallel_revisions=12, parallel_repeats=1, slow_repeats=3, ui_timeout=15.0,
             scale_revisions=100, scale_requirements=100,
             resonant=(1000,), count_sweep=(10, 100, 1000), orders=(2, 4, 8, 16),
             order_sizes=(100,), order_baselines=False, baseline_slice=50,
             stream=5000, cores=1000, verify_samples=1000, accuracy_subset=3,
            cluster=(20, 200))


class Row:
    """One printed figure: workload, what, value text, goal text, verdict (met/missed/'')."""

    def __init__(self, workload, what, value, goal="", met=None):
        self.workload, self.what, self.value, self.goal = workload, what, value, goal
        self.met = "" if met is None else ("met" if met else "MISSED")


def _ms(x: float) -> str:
    return f"{x * 1e3:.1f} ms"


def _s(x: float) -> str:
    return f"{x:.3f} s"


def machine() -> dict:
    """Cores, CPU model, Python and library versions, BLAS thread settings."""
    import control
    import numpy
    import scipy

    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    env = {k: v for k, v in os.environ.items()
           if k.startswith(("OPENBLAS", "OMP_", "MKL_", "GOTO"))}
    try:
        from threadpoolctl import threadpool_info
        pools = "; ".join(f"{p.get('internal_api')} {p.get('version')} threads={p.get('num_threads')}"
                          for p in threadpool_info())
    except ImportError:
        pools = "threadpoolctl not installed"
    try:
        load = " ".join(f"{x:.2f}" for x in os.getloadavg())
    except OSError:
        load = "unknown"
    return {
        "cores": os.cpu_count(), "cpu": cpu, "python": platform.python_version(),
        "platform": platform.platform(), "numpy": numpy.__version__, "scipy": scipy.__version__,
        "control": control.__version__, "blas env": env or "none set", "blas pools": pools,
        "load average at start": load,
    }


# -- workloads --------------------------------------------------------------------------------

def run_memory(cfg, rows, notes):
    """Fresh subprocess running the family sweep; peak RSS from RUSAGE_CHILDREN (run first,
    before any other child process of this one exists)."""
    import resource

    cmd = [sys.executable, str(Path(__file__).resolve()), "--child-sweep", str(cfg["variants"])]
    out = subprocess.run(cmd, check=True, capture_output=True, text=True,
                         cwd=str(S.ROOT)).stdout.split()
    rss_mb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    rows.append(Row("memory", f"peak RSS, family sweep of {cfg['variants']} variants "
                    "(fresh process)", f"{rss_mb:.0f} MB", "< 500 MB", rss_mb < 500))
    notes["memory"] = {"children_maxrss_mb": rss_mb, "child_self_mb": int(out[1]) / 1024,
                       "child_sweep_s": float(out[0])}


def run_sweep(cfg, rows, notes):
    from benchmarks import sweep as W

    t0 = time.perf_counter()
    fam = S.family(cfg["variants"])
    t_fam = time.perf_counter() - t0
    eng = W.engine_sweep(fam, repeats=2)
    base = W.baseline_sweep(fam, limit=cfg["baseline"])
    per_base = base.seconds / base.variants * eng.variants
    ratio = per_base / eng.seconds
    ratio_cpu = (base.cpu_seconds / base.variants * eng.variants) / eng.cpu_seconds
    rows.append(Row("family sweep", f"build family of {len(fam)} variants", _s(t_fam)))
    rows.append(Row("family sweep", f"engine measure_family, {len(S.SUITE)} metrics x "
                    f"{eng.variants} variants (best of 2), wall / CPU",
                    f"{_s(eng.seconds)} / {_s(eng.cpu_seconds)}", "< 0.2 s", eng.seconds < 0.2))
    rows.append(Row("family sweep", f"per-variant python-control loop, first {base.variants} "
                    f"of the {eng.variants} variants, wall / CPU",
                    f"{_s(base.seconds)} / {_s(base.cpu_seconds)}"))
    rows.append(Row("family sweep", f"speed-up engine vs per-variant loop (loop time per "
                    f"variant x {eng.variants}), wall / CPU", f"{ratio:.1f}x / {ratio_cpu:.1f}x",
                    ">= 50x", ratio >= 50))
    dis = W.disagreement(eng, base)
    for name, d in dis.items():
        extra = f", {d['finite_mismatch']} variant(s) finite in one only" if d["finite_mismatch"] else ""
        rows.append(Row("family sweep", f"max rel. disagreement vs python-control: {name}",
                        f"{d['rel']:.2e} (variant {d['variant']}){extra}"))
    cf = W.closed_form_checks(fam, eng)
    for name, e in cf.items():
        kind = "independent reference" if name.startswith("dense") else "closed form"
        rows.append(Row("family sweep", f"max rel. error vs {kind}: {name}", f"{e:.2e}",
                        "<= 1e-6", e <= 1e-6))
    notes["sweep"] = {"engine_errors": eng.errors, "disagreement": dis, "closed_form": cf}
    return fam


def run_split(cfg, rows, notes, tmp):
    """Profile one ledger revision (plan, compute over the family, judge, write)."""
    from benchmarks import sweep as W
    from ledger.api import open_ledger
    from ledger import verify as V

    path = tmp / "split.db"
    with open_ledger(path, create=True, author="bench") as lg:
        lg.auto_verify = False
        lg.add_plant("pipette", S.PLANT_TEXT, params=S.PARAMS,
                     fidelity={"full-order": S.FULL_TEXT}, samples=cfg["variants"] - 6, seed=1)
        lg.add_loop("pipette-z", "pipette")
        for key, metric, limit in S.REQUIREMENTS:
            lg.add_requirement(key, title=metric, statement=f"{metric} {limit}", metric=metric,
                               limit=limit, loops=["pipette-z"])
        V.clear_family_cache()       # the family build is part of a first revision's cost
        prof = W.profile_split(lambda: lg.add_revision("pipette-z", S.CONTROLLER,
                                                       rationale="profiled revision"))
    share = prof["outside_share"]
    rows.append(Row("split", "one revision through the ledger (profiled wall time)",
                    _s(prof["wall"])))
    rows.append(Row("split", "time outside numeric kernels", f"{share * 100:.1f} %", "< 30 %",
                    share < 0.30))
    notes["split"] = prof


def run_incremental(cfg, rows, notes, tmp):
    from benchmarks import ledgers as Lg
    from ledger.api import open_ledger

    path = tmp / "incremental.db"
    b = Lg.build_small_ledger(path, revisions=cfg["small_revisions"], samples=cfg["small_samples"])
    rows.append(Row("incremental", f"build: {b['revisions']} revisions x {len(S.REQUIREMENTS)} "
                    f"requirements, {b['variants']} variants (records / one verify)",
                    f"{_s(b['records_s'])} / {_s(b['verify_s'])}"))
    inc = Lg.incremental(path)
    rows.append(Row("incremental", "change one limit: kernel evaluations",
                    str(inc["rethreshold_requests"]), "0", inc["rethreshold_requests"] == 0))
    rows.append(Row("incremental", f"change one limit: time (tip and all {b['revisions']} cached "
                    "revisions re-judged, one chained batch each)",
                    _ms(inc["rethreshold_s"]), "< 50 ms", inc["rethreshold_s"] < 0.05))
    with open_ledger(path, author="bench") as lg:
        t0 = time.perf_counter()
        rep = lg.verify(keys=["PZ-08"])
        t_all = time.perf_counter() - t0
        n_all = lg.kernel_requests
    rows.append(Row("incremental", f"re-judge that limit on all {len(rep)} other revisions: "
                    "kernel evaluations / time", f"{n_all} / {_ms(t_all)}", "0 evaluations",
                    n_all == 0))
    rows.append(Row("incremental", "add one revision: kernel evaluations (its own) / time",
                    f"{inc['add_requests']} / {_ms(inc['add_s'])}",
                    f"{len(S.REQUIREMENTS)} (one per requirement)",
                    inc["add_requests"] == len(S.REQUIREMENTS)))
    notes["incremental"] = {**b, **inc, "rejudge_all_s": t_all, "rejudge_all_requests": n_all}
    return path


def run_parallel(cfg, rows, notes, tmp, small_path):
    from benchmarks import ledgers as Lg

    if cfg["parallel_revisions"] != cfg["small_revisions"]:
        small_path = tmp / "parallel-src.db"
        Lg.build_small_ledger(small_path, revisions=cfg["parallel_revisions"],
                              samples=cfg["small_samples"])
    import json
    import resource

    load = " ".join(f"{x:.2f}" for x in os.getloadavg())
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child-parallel", str(small_path),
           str(tmp), str(cfg["parallel_repeats"])]
    p = json.loads(subprocess.run(cmd, check=True, capture_output=True, text=True,
                                  cwd=str(S.ROOT)).stdout.strip().splitlines()[-1])
    p = {int(k) if k.isdigit() else k: v for k, v in p.items()}
    rows.append(Row("parallel", f"re-verify {p[1]['revisions']} revisions after a plant change, "
                    f"workers=1 / workers=2, fresh process (best of {cfg['parallel_repeats']}, "
                    f"alternated; load average before: {load})",
                    f"{_s(p[1]['seconds'])} / {_s(p[2]['seconds'])}"))
    rows.append(Row("parallel", "speed-up workers=2 vs workers=1, fresh process",
                    f"{p['speedup']:.2f}x", ">= 1.7x", p["speedup"] >= 1.7))
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    q = Lg.parallel(small_path, tmp, repeats=cfg["parallel_repeats"])
    rows.append(Row("parallel", f"the same inside the benchmark's own process (peak RSS so far "
                    f"{rss:.0f} MB), workers=1 / workers=2",
                    f"{_s(q[1]['seconds'])} / {_s(q[2]['seconds'])}"))
    rows.append(Row("parallel", "speed-up workers=2 vs workers=1, large parent process",
                    f"{q['speedup']:.2f}x", ">= 1.7x", q["speedup"] >= 1.7))
    p["in_process"] = q
    notes["parallel"] = p


def run_scale(cfg, rows, notes, tmp):
    from benchmarks import ledgers as Lg

    path = tmp / "scale.db"
    b = Lg.build_scale_ledger(path, revisions=cfg["scale_revisions"],
                              requirements=cfg["scale_requirements"])
    rows.append(Row("ledger scale", f"bulk build: {b['revisions']} revisions x "
                    f"{b['requirements']} requirements = {b['results']} results",
                    f"{_s(b['bulk_s'])} (+ {_s(b['api_s'])} records through the API)"))
    rows.append(Row("ledger scale", "file size", f"{b['size_mb']:.0f} MB"))
    r = Lg.scale_reads(path, failing_key=b["failing_key"], slow_repeats=cfg["slow_repeats"])
    rows.append(Row("ledger scale", "open", _ms(r["open"][0])))
    rows.append(Row("ledger scale", f"matrix of the latest 20 revisions ({r['matrix_entries']} "
                    "cells), first / best of 3", f"{_ms(r['matrix20'][0])} / {_ms(r['matrix20'][1])}",
                    "< 200 ms", r["matrix20"][1] < 0.2))
    rows.append(Row("ledger scale", "diff tip vs parent, first / best of 3",
                    f"{_ms(r['diff'][0])} / {_ms(r['diff'][1])}", "< 50 ms", r["diff"][1] < 0.05))
    rows.append(Row("ledger scale", f"first failing revision (run of {r['failing_run_length']}, "
                    f"began at {r['first_failing_label']}), first / best of {cfg['slow_repeats']}",
                    f"{_ms(r['first_failing'][0])} / {_ms(r['first_failing'][1])}", "< 100 ms",
                    r["first_failing"][1] < 0.1))
    rows.append(Row("ledger scale", "Ledger.lineage() of the whole loop", r["lineage"]))
    for what, n in r["queries"].items():
        rows.append(Row("ledger scale", f"SQL statements issued: {what}", str(n)))
    u = Lg.ui_start(path, timeout=cfg["ui_timeout"])
    rows.append(Row("ledger scale", "UI: first screen mounted (headless, imports included)",
                    _s(u["mounted"]), "< 1 s", u["mounted"] < 1.0))
    if u["error"]:
        shown = f"failed: {u['error'][:160]}"
    elif u["data"] is None:
        shown = f"not within {cfg['ui_timeout']:.0f} s"
    else:
        shown = _s(u["data"])
    rows.append(Row("ledger scale", "UI: lineage view filled with the ledger's data", shown,
                    "< 1 s", u["data"] is not None and u["data"] < 1.0))
    notes["scale"] = {**b, **{k: v for k, v in r.items()}, "ui": u}


def _ratio(a: float, b: float) -> str:
    return f"{a / b:.2f}x" if b > 0 else "n/a"


def run_hard(cfg, rows, notes):
    """The resonant families (benchmarks/resonant.py): sizes, variant-count and plant-order
    sweeps, each point in a fresh subprocess; the per-variant python-control loop from a slice;
    the numpy floor; accuracy against dense references."""
    from benchmarks import hard as Hd
    from benchmarks import resonant as R

    wk = "resonant"
    nslice = cfg["baseline_slice"]
    base = Hd.baseline_per_variant(nslice, order=4)
    per_var, per_cpu = base["seconds"] / nslice, base["cpu"] / nslice
    rows.append(Row(wk, f"per-variant python-control loop, first {nslice} variants of the "
                    "order-4 family (two BLAS threads: the machine's default), wall / CPU",
                    f"{_s(base['seconds'])} / {_s(base['cpu'])}"))
    notes["hard_load"] = " ".join(f"{x:.2f}" for x in os.getloadavg())
    points = {}
    for n in sorted(set(cfg["resonant"]) | set(cfg["count_sweep"])):
        points[n] = Hd.run_point(n, 4)
    goals = {1000: (1.0, 400), 10_000: (10.0, 600)}
    for n in cfg["resonant"]:
        p = points[n]
        tg, mg = goals.get(n, (math.inf, math.inf))
        rows.append(Row(wk, f"measure_family, {len(S.SUITE)} metrics x {n} variants, 1 mode "
                        f"(fresh process; load average before the sizes: {notes['hard_load']}), "
                        "wall / CPU", f"{_s(p['seconds'])} / {_s(p['cpu'])}",
                        f"< {tg:g} s", p["seconds"] < tg))
        rows.append(Row(wk, f"peak RSS, {n} variants (process with the family, before measuring: "
                        f"{p['family_rss_mb']:.0f} MB)", f"{p['rss_mb']:.0f} MB", f"< {mg} MB",
                        p["rss_mb"] < mg))
        sp, spc = per_var * n / p["seconds"], per_cpu * n / p["cpu"]
        rows.append(Row(wk, f"speed-up vs per-variant loop ({nslice}-variant slice x {n}), "
                        "wall / CPU", f"{sp:.0f}x / {spc:.0f}x", ">= 100x" if n == 1000 else "",
                        sp >= 100 if n == 1000 else None))
    n_floor = cfg["resonant"][0]
    fl = Hd.floor(n_floor)
    r_floor = points[n_floor]["seconds"] / fl["total"]
    rows.append(Row(wk, f"floor, {n_floor} variants: stacked eigenvalues + L on "
                    f"{fl['grid_points']} points + step over {fl['samples']} samples",
                    f"{_ms(fl['eig'])} + {_ms(fl['freq'])} + {_ms(fl['step'])} = "
                    f"{_ms(fl['total'])}"))
    rows.append(Row(wk, f"engine / floor, {n_floor} variants", f"{r_floor:.1f}x", "<= 3x",
                    r_floor <= 3))
    sweep = [points[n] for n in cfg["count_sweep"]]
    for p in sweep:
        rows.append(Row("count sweep", f"{p['n']} variants: wall / CPU / peak RSS",
                        f"{_s(p['seconds'])} / {_s(p['cpu'])} / {p['rss_mb']:.0f} MB"))
    lo, hi = 100, max(cfg["count_sweep"])
    ex = Hd.growth_exponent(sweep, lo, hi)
    rows.append(Row("count sweep", f"fitted growth exponent of wall time, {lo} to {hi} variants",
                    f"{ex:.2f}", "0.9 - 1.1", 0.9 <= ex <= 1.1))
    order_pts = {}
    for n in cfg["order_sizes"]:
        for order in cfg["orders"]:
            p = points[n] if (order == 4 and n in points) else Hd.run_point(n, order)
            order_pts[(order, n)] = p
            goal = "< 5 s" if (order, n) == (16, 1000) else ""
            extra = ""
            if cfg["order_baselines"] and n == max(cfg["order_sizes"]):
                b = base if order == 4 else Hd.baseline_per_variant(nslice, order=order)
                extra = (f", vs per-variant loop {b['seconds'] / nslice * n / p['seconds']:.0f}x"
                         f" wall / {b['cpu'] / nslice * n / p['cpu']:.0f}x CPU")
                if b["failed"]:
                    extra += f" (its step_info failed on {b['failed']} of {nslice})"
            rows.append(Row("order sweep", f"plant order {order} ({len(R.modes(order))} modes), "
                            f"{n} variants: wall / peak RSS{extra}",
                            f"{_s(p['seconds'])} / {p['rss_mb']:.0f} MB", goal,
                            p["seconds"] < 5 if goal else None))
    prof = Hd.profile(cfg["resonant"][0])
    notes_profile = prof
    acc = Hd.accuracy(cfg["accuracy_subset"], baseline=base)
    for m, e in acc.items():
        rows.append(Row("accuracy", f"{m}: max rel. error vs dense reference, first "
                        f"{cfg['accuracy_subset']} variants, engine / per-variant loop",
                        f"{e['engine']:.1e} / {e['baseline']:.1e}",
                        "<= loop's", e["engine"] <= max(e["baseline"], 1e-9)
                        if e["baseline"] == e["baseline"] else None))
    notes["hard"] = {"points": {str(k): v for k, v in points.items()},
                     "orders": {f"{k[0]}@{k[1]}": v for k, v in order_pts.items()},
                     "floor": fl, "accuracy": acc, "exponent": ex,
                     "baseline_per_variant_s": per_var, "profile": notes_profile}


def run_stream(cfg, rows, notes):
    """A large resonant family in one call, measured group by group (fresh process)."""
    from benchmarks import hard as Hd

    n = cfg["stream"]
    p = Hd.run_point(n, 4, lazy=True)
    rows.append(Row("streaming", f"{n} resonant variants in one measure_family call, variants "
                    "made on access (fresh process), wall / CPU", f"{_s(p['seconds'])} / {_s(p['cpu'])}",
                    "< 120 s" if n >= 100_000 else "", p["seconds"] < 120 if n >= 100_000 else None))
    rows.append(Row("streaming", f"peak RSS, {n} variants ({p['family_rss_mb']:.0f} MB "
                    "resident before measuring)",
                    f"{p['rss_mb']:.0f} MB", "< 1024 MB", p["rss_mb"] < 1024))
    notes["stream"] = p


def run_cores(cfg, rows, notes, tmp):
    """One family on two processes: measure_family(workers=2) and verify(workers=2) on one
    revision."""
    from benchmarks import hard as Hd

    n = cfg["cores"]
    load = " ".join(f"{x:.2f}" for x in os.getloadavg())
    one, two = Hd.run_point(n, 4, 1), Hd.run_point(n, 4, 2)
    sp = one["seconds"] / two["seconds"]
    rows.append(Row("cores", f"measure_family on {n} resonant variants, workers=1 / workers=2 "
                    f"(fresh processes; load average before: {load})",
                    f"{_s(one['seconds'])} / {_s(two['seconds'])}"))
    rows.append(Row("cores", "speed-up workers=2 vs 1, measure_family", f"{sp:.2f}x", ">= 1.7x",
                    sp >= 1.7))
    load = " ".join(f"{x:.2f}" for x in os.getloadavg())
    v = Hd.verify_workers(tmp, cfg["verify_samples"])
    rows.append(Row("cores", f"verify one revision, {v['samples']} sampled variants, "
                    f"{len(S.REQUIREMENTS)} requirements, workers=1 / workers=2 (load average "
                    f"before: {load})",
                    f"{_s(v['seconds'][1])} / {_s(v['seconds'][2])}"))
    rows.append(Row("cores", "speed-up workers=2 vs 1, verify", f"{v['speedup']:.2f}x",
                    ">= 1.7x", v["speedup"] >= 1.7))
    notes["cores"] = {"measure": [one, two], "verify": v}


# -- output -----------------------------------------------------------------------------------

def table(rows) -> str:
    w1 = max(len(r.workload) for r in rows)
    w2 = max(len(r.what) for r in rows)
    w3 = max(len(r.value) for r in rows)
    lines = []
    for r in rows:
        lines.append(f"{r.workload:<{w1}}  {r.what:<{w2}}  {r.value:>{w3}}  {r.goal:<10} {r.met}")
    return "\n".join(lines)


def markdown(info, rows, notes, quick: bool, elapsed: float) -> str:
    out = ["# Performance", "",
           "Generated by `python benchmarks/run.py --write-docs` "
           f"on {datetime.now(timezone.utc):%Y-%m-%d %H:%M} UTC"
           f"{' (quick run: reduced sizes)' if quick else ''}; the whole run took "
           f"{elapsed:.0f} s.  Figures are wall-clock times of one run on a shared machine; "
           "ratios are measured side by side in the same run.  Do not edit by hand.", "",
           "## Machine", ""]
    for k, v in info.items():
        out.append(f"- {k}: {v}")
    out += ["", "## Figures", "", "| workload | figure | value | goal | |", "|---|---|---|---|---|"]
    for r in rows:
        out.append(f"| {r.workload} | {r.what} | {r.value} | {r.goal} | {r.met} |")
    if "split" in notes:
        sp = notes["split"]
        out += ["", "## Where the time of one revision goes (cProfile)", "",
                f"Profiled total {sp['profiled_total']:.3f} s, in numeric kernels "
                f"{sp['kernel']:.3f} s (outside: {sp['outside_share'] * 100:.1f} %).  Kernel = "
                "functions of `ledger/engine/{loop,blocks,closedloop,stability,freqresp,freqeval,"
                "freqsolve,freqgrid,crossings,margins,timeresp,timegrid,ssbatch,simulation,"
                "discretize}.py` with everything they call.", "",
                "| kernel entry (cumulative, from outside the kernels) | s |", "|---|---|"]
        out += [f"| `{k}` | {v:.3f} |" for k, v in sp["kernel_entries"]]
        out += ["", "| own time (tottime) of Python functions outside the kernels: ledger driver, "
                "judging, hashing, SQLAlchemy, standard library (numpy, scipy, python-control "
                "and built-ins left out: they are mostly called by kernels) | s |", "|---|---|"]
        out += [f"| `{k}` | {v:.3f} |" for k, v in sp["outside_tottime_top"]]
    missed = [r for r in rows if r.met == "MISSED"]
    if missed:
        out += ["", "## Goals missed in this run", "",
                "| workload | figure | value | goal |", "|---|---|---|---|"]
        out += [f"| {r.workload} | {r.what} | {r.value} | {r.goal} |" for r in missed]
        out += ["", NEXT_CUTS]
    if "hard" in notes and notes["hard"].get("profile"):
        pr = notes["hard"]["profile"]
        out += ["", f"## Where the time of the resonant family goes ({pr['n']} variants, cProfile)",
                "", f"Profiled total {pr['total']:.3f} s (profiling overhead included).", "",
                "| engine function (cumulative) | s |", "|---|---|"]
        out += [f"| `{k}` | {v:.3f} |" for k, v in pr["cumulative"]]
        out += ["", "| engine function (own time) | s |", "|---|---|"]
        out += [f"| `{k}` | {v:.3f} |" for k, v in pr["own"]]
    if "sweep" in notes and notes["sweep"]["engine_errors"]:
        out += ["", "Engine errors during the sweep:", ""]
        out += [f"- {k}: {v}" for k, v in notes["sweep"]["engine_errors"].items()]
    if "cluster" in notes:
        from benchmarks import cluster as C

        out += ["", "## Verification on a Dask cluster: 64 workers on paper", "",
                C.extrapolation(notes["cluster"])]
    out += ["", "## How the workloads are built", "",
            "- Scenario: invented pipette axis K/(s (tau_m s + 1)), K = 180 +-10 %, "
            "tau_m = 30 ms +-20 %, full-order model with tau_e = 0.4 ms; controller "
            f"`{S.CONTROLLER}`; family = nominal, 4 corners, seeded samples, full-order model.",
            "- Per-variant baseline: control.feedback, control.step_info, "
            "control.stability_margins, control.bandwidth, control.step_response for the "
            "effort, and gridded maxima of |S|, |T|, |S - T| on 2,000 log-spaced points "
            "(0.1 to 1e5 rad/s).  Disagreements are relative, largest over the variants.",
            "- Closed forms: proportional control on the reduced model (crossover and phase "
            "margin in closed form), and brentq on the analytic |L(jw)| and arg L(jw) of the "
            "PID loop for 40 variants including the full-order model.",
            "- Independent reference for the time metrics: scipy.signal.step of the closed "
            "loop built from the parameters with numpy polynomials, on a 1 us grid (crossings "
            "interpolated linearly, the peak by a parabola), for the nominal model, the 4 "
            "corners and the full-order model.",
            "- Incremental: revisions added with `add_revision(verify=False)`, then one "
            "`verify()`; kernel evaluations counted with `Ledger.kernel_requests`.",
            "- Parallel: copies of one small ledger (40 revisions in the full run), the same new "
            "plant version (new sample seed) in each, `verify(workers=1)` vs "
            "`verify(workers=2)`, alternated, best of each.",
            "- Ledger scale: schema by `open_ledger(create=True)`, records through the API, "
            "then revisions (one lineage chain) and results by `executemany` in one "
            "transaction; one requirement fails on the last 50 revisions.",
            "- Memory: the sweep in a fresh subprocess, `ru_maxrss` of RUSAGE_CHILDREN.",
            "- Resonant families (`benchmarks/resonant.py`): an invented servo axis "
            "K/(s (tau_m s + 1)) times structural modes w^2/(s^2 + 2 z w s + w^2), the first at "
            "40 Hz with damping 0.05, every parameter +-20 % (seeded uniform draws); plant order "
            "2 + 2 x modes; controller lead + integrator "
            f"`{_resonant_controller()}`; the 14-metric benchmark suite.  Each timed point "
            "(1,000 and 10,000 variants, the variant-count and plant-order sweeps, streaming, "
            "workers) runs in a fresh subprocess: time of one `measure_family` call after a "
            "3-variant warm-up, peak RSS from `VmHWM` of that process (its figure includes "
            "the interpreter, the libraries and the family itself).",
            "- Per-variant python-control loop on the resonant family: the same loop as the "
            "family sweep (`benchmarks/sweep.py`) but with a 4 s, 4,001-point time vector for "
            "`step_info` and `step_response` (the automatic one fails in `step_info` on the "
            "order-16 loops), timed on the first 50 variants and scaled to "
            "the family size; it runs with the machine's default BLAS threads (two on this "
            "machine), which is why its CPU time exceeds its wall time.  Speed-ups are given "
            "for wall time and, beside them, CPU time.",
            "- Floor: the least numpy work for the same family (stacked closed-loop eigenvalues, "
            "one Horner evaluation of L on as many frequencies as the engine's grid of one "
            "variant, and the step propagation x[k+1] = Ad x[k] + Bd over as many samples as "
            "the engine's time grid of one variant), best of 3.",
            "- Accuracy: engine and per-variant loop against python-control `stability_margins` "
            "(margins, crossover; the per-variant loop is that reference itself), a 400,001-point "
            "grid refined by bounded `minimize_scalar` (peaks), brentq on |T| (bandwidth) and "
            "`scipy.signal.step` on 2,000,001 points over 4 s (rise, overshoot, settling).",
            "- Streaming: 100,000 resonant variants in one `measure_family` call; the family's "
            "variants are made on access from their stored parameters "
            "(`benchmarks.resonant.lazy_family`), because 100,000 python-control transfer "
            "functions alone would take about a gigabyte; the engine builds, measures and drops "
            "one group at a time.",
            "- Cores: `measure_family(..., workers=2)` against `workers=1` on 10,000 resonant "
            "variants (fresh processes), and `verify(workers=2)` against `verify(workers=1)` on "
            "one revision of a ledger whose plant has 10,000 sampled variants (fresh copies of "
            "one ledger file).",
            "- Exactness against the engine before this work (commit a32b275, before the "
            "resonance clusters): `benchmarks/compare_engine.py` (not part of this run: it "
            "needs a checkout of the earlier engine) gave, for engine-6 on 2026-12-03, a "
            "largest relative difference of 4.7e-12 over every metric and variant of the "
            "resonant "
            "family (1,000 variants), plant orders 2, 4, 8, 16 (100 variants) and the easy "
            "family (1,000 variants).", ""]
    return "\n".join(out)


#: Where the resonant family's time goes and what to cut next (kept true by whoever changes
#: the engine; the profile tables below are measured).
NEXT_CUTS = (
    "Where the time goes on the resonant families (profile below): the engine's cost grows "
    "linearly in the variants beyond a fixed start-up (grouping in clusters of close "
    "resonances, each with its own frequency grid; the fitted exponent below 1 is that "
    "start-up), about 1 ms per variant for one mode, spread over many vectorised kernels "
    "rather than one hot spot.  Measured per kernel on 1,000 variants of order 4: the step "
    "metrics about 35 % (one simulation of the closed loop per pool of consecutive clusters, "
    "at most 8192 / m^2 variants, shared by r->y, r->e and r->u; crossings and extrema refined "
    "between samples by a Taylor-moment series), sup |u| for the peak effort about 8 %, the "
    "peaks of |S| and |T| and the bandwidth about 18 %, the frequency grid and its adaptive "
    "refinement under 10 %, the margins about 10 % and the disk margin about 9 %.  Since "
    "2026-12-03 a mode sets the time step only while its share of the step response is above "
    "1e-10 of the response (modal residue; the horizon still follows every mode for 15 time "
    "constants): at plant order 16 the structural modes far above the crossover have residues "
    "near 1e-13, and a pool's grid fell from about 12,500 to 7,600 samples per variant.  The "
    "balancing scales are grouped by a dict instead of a row sort, and a horizon extension "
    "continues in place.  At order 16 the time responses are still about 40 % of the time: "
    "the propagation over the remaining samples (lightly damped modes with real residues, "
    "each followed for its life, the pool's grid following the longest-lived member), and "
    "the refinement between samples, which falls back to matrix exponentials where the step "
    "times the norm of M is too large for the series.  Next cuts, largest first: (1) "
    "per-variant time grids inside a pool (today the pool's fine segments last as long as "
    "its longest-lived member's mode); (2) refinement between samples from the modal form "
    "the grid already computes (n multiplications per point instead of a matrix "
    "exponential), with the matrix exponential kept for ill-conditioned eigenvectors; (3) one "
    "adaptive refinement on L with S, T and the disk function judged on the same points "
    "(today each refines its own, because a grid fine enough for L is not always fine enough "
    "for S near -1); (4) fewer numpy calls per group (the fixed cost of each small cluster: "
    "at order 16 a cluster holds 6 variants).  Tried and set aside: filling long propagation "
    "segments from anchor states by one matrix product per variant (3 % of the total at "
    "order 16).  Workers: tasks of groups shrink towards the end so both workers finish "
    "together; the rest of the gap to 2x is the serial planning (about 0.2 s on 10,000 "
    "variants) and two processes sharing the caches of two cores.")


def _resonant_controller() -> str:
    from benchmarks import resonant as R
    return R.CONTROLLER_TEXT


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="loopledger speed and scale benchmark")
    ap.add_argument("--quick", action="store_true", help="reduced sizes, about two minutes")
    ap.add_argument("--write-docs", action="store_true", help="rewrite docs/performance.md")
    ap.add_argument("--only", default="", help="comma-separated workloads: memory,sweep,"
                    "resonant,streaming,cores,split,incremental,parallel,scale,cluster")
    ap.add_argument("--child-family", nargs=4, type=int, default=None, help=argparse.SUPPRESS)
    ap.add_argument("--child-sweep", type=int, default=0, help=argparse.SUPPRESS)
    ap.add_argument("--child-parallel", nargs=3, default=None, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child_parallel:
        import json

        from benchmarks import ledgers as Lg
        src, tmpdir, repeats = args.child_parallel
        print(json.dumps(Lg.parallel(Path(src), Path(tmpdir), repeats=int(repeats))))
        return 0
    if args.child_family:
        from benchmarks import hard as Hd
        Hd.child_family(*args.child_family)
        return 0
    if args.child_sweep:
        from benchmarks import sweep as W
        W.child_sweep(args.child_sweep)
        return 0
    cfg = QUICK if args.quick else FULL
    only = set(filter(None, args.only.split(",")))

    def want(name):
        return not only or name in only

    t_start = time.perf_counter()
    info = machine()
    if S.demo_spec_path():
        info["demo spec"] = f"{S.demo_spec_path()} present (workloads use benchmarks/scenario.py)"
    rows: list[Row] = []
    notes: dict = {}
    with tempfile.TemporaryDirectory(prefix="loopledger-bench-") as d:
        tmp = Path(d)
        steps = [("memory", lambda: run_memory(cfg, rows, notes)),
                 ("sweep", lambda: run_sweep(cfg, rows, notes)),
                 ("resonant", lambda: run_hard(cfg, rows, notes)),
                 ("streaming", lambda: run_stream(cfg, rows, notes)),
                 ("cores", lambda: run_cores(cfg, rows, notes, tmp)),
                 ("split", lambda: run_split(cfg, rows, notes, tmp)),
                 ("incremental", lambda: notes.__setitem__(
                     "_small", run_incremental(cfg, rows, notes, tmp))),
                 ("parallel", lambda: run_parallel(cfg, rows, notes, tmp, notes.get("_small")
                                                   or _fresh_small(cfg, tmp))),
                 ("scale", lambda: run_scale(cfg, rows, notes, tmp)),
                 ("cluster", lambda: _run_cluster(cfg, rows, notes, tmp))]
        for name, step in steps:
            if want(name):
                t0 = time.perf_counter()
                n_before = len(rows)
                try:
                    step()
                except Exception as e:  # noqa: BLE001 - a failed workload is itself a figure
                    rows.append(Row(name, "workload failed", f"{type(e).__name__}: {e}"[:120]))
                print(f"[{name} done in {time.perf_counter() - t0:.1f} s]", file=sys.stderr,
                      flush=True)
                print(table(rows[n_before:]) if rows[n_before:] else "", file=sys.stderr,
                      flush=True)
    notes.pop("_small", None)
    notes.pop("hard_load", None)
    elapsed = time.perf_counter() - t_start
    print(table(rows))
    print(f"\n(total {elapsed:.0f} s; {info['cores']} cores, {info['cpu']}; "
          f"load average at start {info['load average at start']})")
    if args.write_docs:
        doc = S.ROOT / "docs" / "performance.md"
        doc.write_text(markdown(info, rows, notes, args.quick, elapsed))
        print(f"wrote {doc}")
    return 0


def _run_cluster(cfg, rows, notes, tmp):
    """benchmarks/cluster.py: in-process, process pool, local Dask cluster of 2."""
    from benchmarks import cluster as C

    revisions, variants = cfg["cluster"]
    res = C.measure(tmp, revisions=revisions, variants=variants)
    rows.extend(Row("cluster", what, value) for what, value in C.rows(res))
    notes["cluster"] = res


def _fresh_small(cfg, tmp):
    from benchmarks import ledgers as Lg

    path = tmp / "parallel-src.db"
    Lg.build_small_ledger(path, revisions=cfg["parallel_revisions"], samples=cfg["small_samples"])
    return path


if __name__ == "__main__":
    sys.exit(main())
