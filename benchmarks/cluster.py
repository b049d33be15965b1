"""Re-verify every revision of a synthetic ledger in-process, with the process pool and on a
local Dask cluster of two workers; per-task cost, serial fraction, speed-ups.

Usage::

    python benchmarks/cluster.py            # 200 revisions x a 1,000-variant family
    python benchmarks/cluster.py --quick    # 20 revisions x 200 variants
    python benchmarks/cluster.py --revisions 60 --variants 1000

Also the ``cluster`` workload of ``benchmarks/run.py``.  Work: the ledger of
``benchmarks.ledgers.build_small_ledger`` (the pipette scenario, 14 requirements), then a new
plant version (next sample seed) in a fresh copy per run, so each run re-verifies every
revision from nothing.  Figures only, never an assertion on time.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import time
from pathlib import Path

if __package__ in (None, ""):          # run as a script: make ``benchmarks`` importable
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
    __package__ = "benchmarks"

from benchmarks import scenario as S  # noqa: E402

__all__ = ["measure", "noop", "rows", "extrapolation"]


def noop(unit):
    """A task that computes nothing: its round trip is the executor's per-task cost."""
    return len(unit.parts)


def _warm() -> None:
    import control  # noqa: F401

    import ledger.engine.kernels  # noqa: F401
    import ledger.verification.units  # noqa: F401 - what a first task would import


def _fresh(src: Path, dst: Path) -> Path:
    from ledger.api import open_ledger

    shutil.copyfile(src, dst)
    with open_ledger(dst, author="bench") as lg:
        lg.auto_verify = False
        info = lg.plant("pipette")
        lg.add_plant("pipette", S.PLANT_TEXT, params=S.PARAMS,
                     fidelity={"full-order": S.FULL_TEXT}, samples=info.samples, seed=2,
                     note="new sample seed")
    return dst


def _timed_verify(path: Path, **kw) -> dict:
    """One verify(): wall time, planning time (until the first progress call), time spent in
    the ledger's write transactions, tasks."""
    from ledger.api import open_ledger

    out = {"tasks": 0, "planning": 0.0, "writing": 0.0}
    with open_ledger(path, author="bench") as lg:
        write = lg.store.write

        def timed_write(fn, *a, **k):
            t = time.perf_counter()
            try:
                return write(fn, *a, **k)
            finally:
                out["writing"] += time.perf_counter() - t

        lg.store.write = timed_write
        t0 = time.perf_counter()

        def progress(done, total, what):
            out["tasks"] = total
            if done == 0:
                out["planning"] = time.perf_counter() - t0

        rep = lg.verify(progress=progress, **kw)
        out["seconds"] = time.perf_counter() - t0
    out["revisions"] = len(rep)
    out["requests"] = sum(r["computed"] for r in rep)
    return out


def measure(tmp: Path, *, revisions: int, variants: int, workers: int = 2) -> dict:
    """Every figure of the workload (see the module docstring)."""
    from benchmarks import ledgers as Lg
    from ledger.verification.plan import plan_loops
    from ledger.verification.units import make_units
    from ledger.api import open_ledger

    src = tmp / "cluster-src.db"
    Lg.build_small_ledger(src, revisions=revisions, samples=max(0, variants - 6))
    res: dict = {"revisions": revisions, "variants": variants, "workers": workers}
    res["in_process"] = _timed_verify(_fresh(src, tmp / "c-in.db"))
    res["pool"] = _timed_verify(_fresh(src, tmp / "c-pool.db"), workers=workers)
    from ledger.verification.cluster import DaskCluster

    t0 = time.perf_counter()
    local = DaskCluster(f"local:{workers}")     # what 'verify --cluster local:N' starts
    client = local._connect()
    client.wait_for_workers(workers, timeout=600)
    client.run(_warm)  # the imports a worker's first task would pay (python-control: ~2 s)
    res["cluster_start_s"] = time.perf_counter() - t0
    try:
        res["dask"] = _timed_verify(_fresh(src, tmp / "c-dask.db"), cluster=client)
        # per-task cost: the same tasks (same plans carried), computing nothing
        path = _fresh(src, tmp / "c-noop.db")
        with open_ledger(path) as lg, lg.store.reading() as s:
            plans = plan_loops(s)
        from ledger.config import CLUSTER_TASK_WORK

        units, _ = make_units(plans, workers, least_work=CLUSTER_TASK_WORK)
        t0 = time.perf_counter()
        futs = [client.submit(noop, u, pure=False) for u in units]
        client.gather(futs)
        res["noop_tasks"] = len(units)
        res["noop_s"] = time.perf_counter() - t0
    finally:
        local.close()
    a, p, d = res["in_process"], res["pool"], res["dask"]
    res["same_results"] = _results(tmp / "c-in.db") == _results(tmp / "c-dask.db") \
        == _results(tmp / "c-pool.db")
    # per-task cost with both workers busy: wall x slots / tasks
    res["per_task_s"] = res["noop_s"] * workers / max(1, res["noop_tasks"])
    compute = a["seconds"] - a["planning"] - a["writing"]
    res["compute_per_task_s"] = compute / max(1, d["tasks"])
    res["overhead_share"] = res["per_task_s"] / (res["per_task_s"] + res["compute_per_task_s"])
    res["serial_s"] = a["planning"] + a["writing"]
    res["serial_fraction"] = res["serial_s"] / a["seconds"]
    res["speedup_pool"] = a["seconds"] / p["seconds"]
    res["speedup_dask"] = a["seconds"] / d["seconds"]
    return res


def _results(path: Path) -> list:
    import sqlite3

    db = sqlite3.connect(path)
    try:
        return db.execute("SELECT revision_id, requirement_version_id, plant_version_id, "
                          "verdict, value, headroom, worst_variant, pass_fraction, metric_key "
                          "FROM result ORDER BY 1, 2, 3").fetchall()
    finally:
        db.close()


def rows(res: dict) -> list[tuple[str, str]]:
    """(figure, value) lines for printing and for benchmarks/run.py."""
    a, p, d = res["in_process"], res["pool"], res["dask"]
    n, w = f"{res['revisions']} revisions x {res['variants']} variants", res["workers"]
    return [
        (f"re-verify {n}, 14 requirements: in-process / process pool of {w} / local Dask "
         f"cluster of {w}", f"{a['seconds']:.2f} s / {p['seconds']:.2f} s / {d['seconds']:.2f} s"),
        ("tasks: in-process / pool / Dask", f"{a['tasks']} / {p['tasks']} / {d['tasks']}"),
        ("speed-up vs in-process: pool / Dask", f"{res['speedup_pool']:.2f}x / "
         f"{res['speedup_dask']:.2f}x"),
        ("results identical (every column) in the three runs", str(res["same_results"])),
        (f"Dask per-task cost ({res['noop_tasks']} tasks carrying the same plans, computing "
         "nothing; wall x workers / tasks)", f"{res['per_task_s'] * 1e3:.1f} ms"),
        ("compute per Dask task (in-process compute time / tasks)",
         f"{res['compute_per_task_s'] * 1e3:.0f} ms"),
        ("per-task cost as a share of a task", f"{res['overhead_share'] * 100:.1f} %"),
        ("serial part in the submitting process (planning + writing), in-process run",
         f"{res['serial_s']:.2f} s = {res['serial_fraction'] * 100:.1f} % "
         f"(planning {a['planning']:.2f} s, writing {a['writing']:.2f} s)"),
        ("writing in the Dask run / pool run", f"{d['writing']:.2f} s / {p['writing']:.2f} s"),
        (f"local cluster of {w} up (workers joined, engine and python-control imported)",
         f"{res['cluster_start_s']:.2f} s (not in the Dask time)"),
    ]


def estimate(res: dict, workers: int, revisions: int, variants: int) -> dict:
    """Wall time on paper of re-verifying ``revisions`` revisions x ``variants`` variants on
    ``workers`` workers, from the measured per-revision planning, writing and compute (compute
    scaled linearly with the variants: the engine's cost is linear in them) and the per-task
    cost; writing overlaps the computing (results are recorded while workers compute)."""
    a, d = res["in_process"], res["dask"]
    n = res["revisions"]
    plan = a["planning"] / n * revisions
    write = max(a["writing"], d["writing"]) / n * revisions
    compute_rev = (a["seconds"] - a["planning"] - a["writing"]) / n * variants / res["variants"]
    serial_1 = plan + a["writing"] / n * revisions
    t1 = serial_1 + compute_rev * revisions
    tasks = max(d["tasks"] / n * revisions, 4 * workers)
    compute = (compute_rev * revisions + tasks * res["per_task_s"]) / workers
    t = plan + max(write, compute)
    return {"t1": t1, "t": t, "plan": plan, "write": write, "compute": compute,
            "speedup": t1 / t, "bound": t1 / (plan + write),
            "writer_bound_at": compute * workers / max(write, 1e-9)}


def _dur(x: float) -> str:
    return f"{x:.1f} s" if x < 600 else (f"{x / 60:.0f} min" if x < 7200 else f"{x / 3600:.1f} h")


def extrapolation(res: dict, workers: int = 64) -> str:
    """The 64-worker estimate on paper (a paragraph for docs/performance.md)."""
    a, d = res["in_process"], res["dask"]
    n, v = res["revisions"], res["variants"]
    same = estimate(res, workers, n, v)
    big = estimate(res, workers, 10_000, 10_000)
    return (
        f"Measured (benchmarks/cluster.py): {n} revisions x {v} variants, {d['tasks']} Dask "
        f"tasks of {res['compute_per_task_s'] * 1e3:.0f} ms compute each, per-task cost "
        f"{res['per_task_s'] * 1e3:.1f} ms ({res['overhead_share'] * 100:.1f} % of a task); the "
        f"submitting process planned for {a['planning']:.2f} s and wrote for {a['writing']:.2f} s "
        f"in-process, {d['writing']:.2f} s during the Dask run (the larger figure is used "
        f"below).  Model: T(N) = planning + max(writing, (compute + tasks x per-task cost) / N), "
        f"with at least 4N tasks; writing overlaps the computing.  The same ledger on {workers} "
        f"workers: {_dur(same['plan'])} + max({_dur(same['write'])}, {_dur(same['compute'])}) "
        f"= {_dur(same['t'])} against {_dur(same['t1'])} in-process, {same['speedup']:.0f}x: "
        f"the submitting process's writing bounds it ({same['bound']:.0f}x at most).  The "
        f"issue's case, 50 loops x 200 revisions x 10,000 variants (compute per revision scaled "
        f"10x with the variants, planning and writing per revision as measured): "
        f"{_dur(big['t1'])} in-process, on {workers} workers {_dur(big['plan'])} + "
        f"max({_dur(big['write'])}, {_dur(big['compute'])}) = {_dur(big['t'])}, "
        f"{big['speedup']:.0f}x (bound by the serial part: {big['bound']:.0f}x); beyond about "
        f"{big['writer_bound_at']:.0f} workers the one writing process is the limit (writers "
        "per loop would be the next step).")


def main(argv=None) -> int:
    import tempfile

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="20 revisions x 200 variants")
    ap.add_argument("--revisions", type=int, default=None)
    ap.add_argument("--variants", type=int, default=None)
    ap.add_argument("--json", action="store_true", help="also print the raw figures as JSON")
    args = ap.parse_args(argv)
    revs = args.revisions or (20 if args.quick else 200)
    var = args.variants or (200 if args.quick else 1000)
    with tempfile.TemporaryDirectory(prefix="loopledger-cluster-") as d:
        res = measure(Path(d), revisions=revs, variants=var)
    for what, value in rows(res):
        print(f"{what}: {value}")
    print()
    print(extrapolation(res))
    if args.json:
        print(json.dumps(res))
    return 0


if __name__ == "__main__":
    sys.exit(main())
