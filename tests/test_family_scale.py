"""Large and resonant families: grouping, streaming and worker processes give the numbers of
one plain call, and margins agree with python-control on a resonant family."""

from __future__ import annotations

import importlib
import math
import warnings

import control
import numpy as np
import pytest

from ledger.engine import loop as LP
from ledger.engine.loop import LoopSpec, plan
from ledger.engine.metrics import STANDARD_SUITE
from ledger.engine.stability import stability
from ledger.engine.types import PlantFamily, Variant

M = importlib.import_module("ledger.engine.measure")   # the module (ledger.engine.measure is also a function name)

SUITE = STANDARD_SUITE + ("peak_effort", "gain_crossover")


def servo_family(n: int, modes: int = 1, seed: int = 3) -> PlantFamily:
    """Invented servo axis K/(s (tau s + 1)) with ``modes`` structural modes (40 Hz, 76 Hz..,
    damping 0.05), every parameter drawn within +-20 %."""
    rng = np.random.default_rng(seed)
    out = []
    for i in range(n):
        f = rng.uniform(0.8, 1.2, 2 + 2 * modes)
        num, den = np.array([20.0 * f[0]]), np.polymul([1.0, 0.0], [0.01 * f[1], 1.0])
        for k in range(modes):
            w, z = 2 * math.pi * 40.0 * 1.9 ** k * f[2 + 2 * k], 0.05 * f[3 + 2 * k]
            num = num * w * w
            den = np.polymul(den, [1.0, 2 * z * w, w * w])
        out.append(Variant(f"v{i:04d}", "sample", control.tf(num, den)))
    return PlantFamily(tuple(out))


def lead_integrator():
    s = control.tf("s")
    return 0.3 * (1 + 1 / (0.3 * s)) * (0.1 * s + 1) / (0.03 * s + 1)


def values(res):
    return {k: np.asarray(r.values, float) for k, r in res.results.items()}


def assert_identical(a, b):
    va, vb = values(a), values(b)
    assert va.keys() == vb.keys()
    for k in va:
        np.testing.assert_array_equal(va[k], vb[k], err_msg=a.results[k].name)
        assert a.results[k].variant_errors == b.results[k].variant_errors
    np.testing.assert_array_equal(a.stability.unstable_poles, b.stability.unstable_poles)
    assert a.stability.reasons == b.stability.reasons


def test_resonant_variants_form_small_clusters():
    fam = servo_family(120, modes=2)
    pl = plan(fam, lead_integrator())
    clusters = [c for gp in pl.groups for c in (gp.clusters or (gp.index,))]
    sizes = [c.size for c in clusters]
    # two lightly damped pairs per variant: 3000 // (63 * 2) = 23 variants per cluster
    assert max(sizes) == 3000 // (63 * 2) and sum(sizes) == 120
    assert sorted(np.concatenate([gp.index for gp in pl.groups]).tolist()) == list(range(120))
    # clusters are pooled for their time responses: 8192 // m^2 variants at most, with
    # m = 6 plant + 2 controller states + 1 = 9 (4 clusters of 23)
    assert len(pl.groups) < len(clusters)
    for gp in pl.groups:
        assert gp.index.size <= LP._POOL_BUDGET // 9 ** 2
        if gp.clusters:
            assert np.array_equal(gp.index, np.concatenate(gp.clusters))
            assert [p.index.tolist() for p in gp.parts()] == [c.tolist() for c in gp.clusters]


def _time_suite():
    return [n for n in SUITE if n in M._POOLED]


def test_pooled_time_responses_match_cluster_by_cluster(monkeypatch):
    """A pool of clusters shares one time grid; the time metrics are refined on the exact
    response (root finding to 1e-13 of a step), so they agree with each cluster's own grid to
    the engine's accuracy contract of 1e-9 relative (docs/performance.md); the frequency
    metrics (one grid per cluster either way) and the stability decisions are bitwise equal."""
    fam = servo_family(120, modes=2)
    C = lead_integrator()
    assert any(gp.clusters for gp in plan(fam, C).groups)
    got = M.measure_family(fam, C, LoopSpec(), list(SUITE))
    monkeypatch.setattr(LP, "_POOL_BUDGET", 0)
    assert not any(gp.clusters for gp in plan(fam, C).groups)
    ref = M.measure_family(fam, C, LoopSpec(), list(SUITE))
    timed = set(_time_suite())
    assert timed
    for k, r in ref.results.items():
        a, b = np.asarray(got.results[k].values), np.asarray(r.values)
        assert got.results[k].variant_errors == r.variant_errors
        if r.name in timed:
            assert np.array_equal(np.isfinite(a), np.isfinite(b)), r.name
            fin = np.isfinite(b)
            np.testing.assert_allclose(a[fin], b[fin], rtol=1e-9, atol=0, err_msg=r.name)
        else:
            np.testing.assert_array_equal(a, b, err_msg=r.name)


def test_pool_error_falls_back_to_each_cluster(monkeypatch):
    """When the pooled time response raises, every cluster is measured on its own: the numbers
    are then those of an unpooled plan, bitwise."""
    from ledger.engine import kernels as Kn
    from ledger.errors import ComputeError

    fam = servo_family(120, modes=2)
    C = lead_integrator()

    def refuse(self, path):
        raise ComputeError("refused for the test")

    monkeypatch.setattr(Kn._PoolContext, "batch", refuse)
    got = M.measure_family(fam, C, LoopSpec(), _time_suite())
    monkeypatch.setattr(LP, "_POOL_BUDGET", 0)
    ref = M.measure_family(fam, C, LoopSpec(), _time_suite())
    assert_identical(got, ref)


def test_clustered_values_match_one_shared_grid(monkeypatch):
    """Clusters against the former single group (every variant on one shared grid).  Every
    reported number is refined off the grid (crossings to 1e-14, peaks to 1e-10 in frequency,
    so peak values to ~1e-20, time metrics by root finding on the exact response), so the
    grid only moves brackets: agreement to 1e-9 relative is the engine's own accuracy
    contract (docs/performance.md), far above the round-off of these well-conditioned loops."""
    fam = servo_family(60)
    C = lead_integrator()
    got = M.measure_family(fam, C, LoopSpec(), list(SUITE))
    monkeypatch.setattr(LP, "_RESONANCE_BUDGET", 10 ** 9)
    assert len(plan(fam, C).groups) == 1
    ref = M.measure_family(fam, C, LoopSpec(), list(SUITE))
    for k, r in ref.results.items():
        a, b = np.asarray(got.results[k].values), np.asarray(r.values)
        assert np.array_equal(np.isfinite(a), np.isfinite(b)), r.name
        fin = np.isfinite(b)
        np.testing.assert_allclose(a[fin], b[fin], rtol=1e-9, atol=0, err_msg=r.name)


def test_streamed_groups_equal_materialised_assembly():
    """measure_family builds and drops one group at a time: exactly the numbers of the whole
    assembly built at once (and of a plan checked in other chunk sizes)."""
    fam = servo_family(100)
    C = lead_integrator()
    one = M.measure_family(fam, C, LoopSpec(), list(SUITE))
    pl = plan(fam, C, chunk=7)
    reqs = [(n, M.resolve_settings(n, None), M.request_key(n, M.resolve_settings(n, None)))
            for n in SUITE]
    streamed = M._collect(pl, reqs, (M._measure_group(pl, gp, reqs) for gp in pl.groups))
    assert_identical(streamed, one)
    asm = LP.assemble(fam, C)
    assert [g.index.tolist() for g in asm.groups] == [gp.index.tolist() for gp in pl.groups]
    st = stability(asm)
    np.testing.assert_array_equal(st.unstable_poles, one.stability.unstable_poles)
    assert st.reasons == one.stability.reasons


def test_unstable_variants_keep_their_reasons_in_family_order():
    fam = servo_family(40)
    s = control.tf("s")
    hot = 3.0 * (1 + 1 / (0.3 * s)) * (0.1 * s + 1) / (0.03 * s + 1)   # gain x10: some unstable
    res = M.measure_family(fam, hot, LoopSpec(), list(SUITE))
    bad = ~res.stability.stable
    assert bad.any()
    errs = res.get("overshoot").variant_errors
    assert list(errs) == [n for n, b in zip(res.variants, bad) if b]
    pl = plan(fam, hot, chunk=5)
    reqs = [(n, M.resolve_settings(n, None), M.request_key(n, M.resolve_settings(n, None)))
            for n in SUITE]
    assert_identical(M._collect(pl, reqs, (M._measure_group(pl, gp, reqs)
                                           for gp in pl.groups)), res)


def test_workers_give_identical_results():
    fam = servo_family(200)     # 5 clusters of 47 or fewer, pooled 3 + 2
    C = lead_integrator()
    assert len(plan(fam, C).groups) >= 2
    one = M.measure_family(fam, C, LoopSpec(), list(SUITE))
    two = M.measure_family(fam, C, LoopSpec(), list(SUITE), workers=2)
    assert_identical(two, one)


def test_tasks_cover_the_groups_in_order_and_shrink_towards_the_end():
    # common practice, no source: guided self-scheduling (tasks of about remaining / (2 N)),
    # so the last tasks are small and the workers finish together
    for n, w, least in [(71, 2, 1), (10, 2, 3), (3, 4, 1), (1, 2, 1), (500, 8, 2)]:
        tasks = M.task_groups(n, w, least=least)
        assert [k for t in tasks for k in t] == list(range(n))
        sizes = [len(t) for t in tasks]
        assert sizes == sorted(sizes, reverse=True)
        assert all(s >= least for s in sizes[:-1])
        assert sizes[-1] <= max(least, 1)
    assert [len(t) for t in M.task_groups(71, 2)][:3] == [18, 14, 10]


def test_margins_match_python_control_on_resonant_family():
    """Reference: python-control ``stability_margins`` (crossings from the polynomial roots of
    |L|^2 = 1 and Im L = 0 of the transfer function), per variant.  The resonance gives several
    phase crossovers; python-control reports the smallest gain margin, as the engine does."""
    fam = servo_family(25)
    C = lead_integrator()
    res = M.measure_family(fam, C, LoopSpec(), ["gain_margin", "phase_margin",
                                                 "gain_crossover"])
    gm, pm, wc = (np.asarray(res.get(n).values) for n in
                  ("gain_margin", "phase_margin", "gain_crossover"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for j, v in enumerate(fam.variants):
            g, p, _, _, w, _ = control.stability_margins(C * v.system)
            # polynomial roots of a 12th-degree |L|^2 - 1 carry ~1e-10 relative error here
            assert gm[j] == pytest.approx(20 * math.log10(g), rel=1e-8)
            assert pm[j] == pytest.approx(p, rel=1e-8)
            assert wc[j] == pytest.approx(w, rel=1e-8)


def test_verify_workers_split_one_revision(tmp_path, monkeypatch):
    """One revision, workers=2: the family is split across processes; the stored verdicts and
    values are those of workers=1."""
    from ledger.api import open_ledger

    tasks = {}   # tasks of the run: > 1 for one revision = its family split (units.py)

    plant = "K/(s*(tau*s+1))*lowpass2(wn, zeta)"
    params = {"K": {"nominal": 20.0, "tol": "20 %"}, "tau": {"nominal": 0.01, "tol": "20 %"},
              "wn": {"nominal": 251.0, "tol": "20 %"}, "zeta": {"nominal": 0.05, "tol": "20 %"}}
    got = {}
    for workers in (1, 2):
        with open_ledger(tmp_path / f"w{workers}.db", create=True, author="test") as lg:
            lg.auto_verify = False
            lg.add_plant("axis", plant, params=params, samples=150, seed=4)  # > 1 pool
            lg.add_loop("axis-loop", "axis")
            for key, metric, limit in (("R1", "phase_margin", ">= 45 deg"),
                                       ("R2", "peak_sensitivity", "<= 2"),
                                       ("R3", "settling_time", "<= 2 s")):
                lg.add_requirement(key, title=metric, statement=f"{metric} {limit}",
                                   metric=metric, limit=limit, loops=["axis-loop"])
            lg.add_revision("axis-loop", "0.3*(1 + 1/(0.3*s))*(0.1*s + 1)/(0.03*s + 1)",
                            rationale="lead and integrator", verify=False)
            lg.verify(workers=workers,
                      progress=lambda d, n, w, k=workers: tasks.__setitem__(k, n))
            got[workers] = [(r.requirement, r.verdict, r.value, r.worst_variant)
                            for r in lg.results("axis-loop")]
    assert tasks[1] == 1 and tasks[2] >= 2
    assert got[2] == got[1] and len(got[1]) == 3
