"""Verification on a Dask cluster (issue 18): the same results as in-process, a killed worker,
a scheduler and workers started separately, the optional extra.

Reference for every comparison: the same ledger verified in this process (``verify()`` without
executor options), whose engine the other tests check against closed forms and python-control;
here "the same" means bitwise: every result column and every cached payload string equal.
Clusters are processes on 127.0.0.1 (``LocalCluster(processes=True)``, or ``dask scheduler`` +
``dask worker`` subprocesses).  No test times anything; timeouts are generous for a loaded
two-core machine.
"""

from __future__ import annotations

import logging
import os
import shutil
import signal
import socket
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest

from ledger.api import open_ledger
from ledger.errors import ClusterError

pytestmark = pytest.mark.cluster
distributed = pytest.importorskip("distributed")

ROOT = Path(__file__).resolve().parents[1]
RESULT_COLUMNS = ("revision_id, requirement_version_id, plant_version_id, verdict, value, "
                  "headroom, headroom_fraction, worst_variant, pass_fraction, variants, reason, "
                  "metric_key, engine_version")
REQUIREMENTS = [("R-1", "phase_margin", ">= 40 deg"), ("R-2", "gain_margin", ">= 6 dB"),
                ("R-3", "overshoot", "<= 25 %"), ("R-4", "settling_time", "<= 0.5 s")]


def _local_cluster(n: int = 2, **config):
    import dask

    with dask.config.set(config):
        cluster = distributed.LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                                           host="127.0.0.1", dashboard_address=None,
                                           silence_logs=logging.CRITICAL)
    client = distributed.Client(cluster, set_as_default=False)
    client.wait_for_workers(n, timeout=300)
    return cluster, client


@pytest.fixture(scope="module")
def client():
    cluster, client = _local_cluster()
    yield client
    client.close()
    cluster.close()


def _rows(path) -> tuple[list, list]:
    db = sqlite3.connect(path)
    try:
        r = db.execute(f"SELECT {RESULT_COLUMNS} FROM result ORDER BY revision_id, "
                       "requirement_version_id, plant_version_id").fetchall()
        m = db.execute("SELECT key, metric, values_json, engine_version FROM metric_value "
                       "ORDER BY key").fetchall()
    finally:
        db.close()
    return r, m


def _small_ledger(path, *, revisions: int = 24, samples: int = 12) -> None:
    with open_ledger(path, create=True, author="tester") as lg:
        lg.auto_verify = False
        lg.add_plant("pz", "K/(s*(tau_m*s+1))", params={
            "K": {"nominal": 180.0, "tol": "10 %"}, "tau_m": {"nominal": 0.03, "tol": "20 %"}},
            fidelity={"full": "K/(s*(tau_m*s+1)*(0.0004*s+1))"}, samples=samples, seed=3)
        lg.add_loop("pz", "pz")
        for key, metric, limit in REQUIREMENTS:
            lg.add_requirement(key, title=metric, statement=f"{metric} {limit}", metric=metric,
                               limit=limit, loops=["pz"])
        for i in range(revisions):
            lg.add_revision("pz", f"pid(kp={0.8 + 0.03 * i:.3f}, ki=2, kd=0.02, tf=0.0005)",
                            rationale=f"step {i}", verify=False)


def _copy(src, dst):
    shutil.copyfile(src, dst)
    return dst


def _new_plant_versions(path) -> None:
    """A new version of every plant (next sample seed): every revision must be verified again."""
    with open_ledger(path, author="tester") as lg:
        lg.auto_verify = False
        for p in lg.plants():
            i = lg.plant(p.name)
            lg.add_plant(i.name, i.model, params=i.params, fidelity=i.fidelity, samples=i.samples,
                         seed=i.seed + 1, sample_time=i.sample_time, input_unit=i.input_unit,
                         output_unit=i.output_unit, note="next sample seed")


def test_demo_ledger_on_a_local_cluster_matches_in_process(tmp_path, client, monkeypatch):
    from ledger.verification.cluster import DaskCluster

    monkeypatch.setattr(DaskCluster, "least_work", 500)   # tasks for both workers
    a = _copy(ROOT / "sample_db" / "demo.db", tmp_path / "a.db")
    b = _copy(a, tmp_path / "b.db")
    for p in (a, b):
        _new_plant_versions(p)
    before = len(_rows(a)[0])
    with open_ledger(a) as lg:
        ref = lg.verify()
    seen = []
    with open_ledger(b) as lg:
        got = lg.verify(cluster=client, progress=lambda d, n, w: seen.append((d, n)))
    assert ref == got and len(ref) > 10
    ra, ma = _rows(a)
    rb, mb = _rows(b)
    assert len(ra) > before
    assert ra == rb          # every result column, bitwise
    assert ma == mb          # the cache: same keys (fingerprints), same payload strings
    assert seen[0][0] == 0 and seen[-1][0] == seen[-1][1] >= 2


def _resonant_ledger(path, samples: int) -> None:
    """One revision over a family of lightly damped servo axes (an invented 40 Hz mode, every
    parameter +-20 %): the engine cuts it into many small groups of close resonances."""
    with open_ledger(path, create=True, author="tester") as lg:
        lg.auto_verify = False
        lg.add_plant("ax", "K/(s*(tau_m*s+1))*wn^2/(s^2+2*zeta*wn*s+wn^2)", params={
            "K": {"nominal": 20.0, "tol": "20 %"}, "tau_m": {"nominal": 0.01, "tol": "20 %"},
            "wn": {"nominal": 251.3, "tol": "20 %"}, "zeta": {"nominal": 0.05, "tol": "20 %"}},
            samples=samples, seed=11)
        lg.add_loop("ax", "ax")
        for key, metric, limit in REQUIREMENTS[:3]:
            lg.add_requirement(key, title=metric, statement=f"{metric} {limit}", metric=metric,
                               limit=limit, loops=["ax"])
        lg.add_revision("ax", "0.3*(1 + 1/(0.3*s))*(0.1*s + 1)/(0.03*s + 1)",
                        rationale="lead and integrator", verify=False)


def test_a_2000_variant_family_in_chunks_matches_in_process(tmp_path, client, monkeypatch):
    from ledger.verification.cluster import DaskCluster

    monkeypatch.setattr(DaskCluster, "least_work", 500)   # several chunks of the one family
    a = tmp_path / "a.db"
    _resonant_ledger(a, samples=1984)
    b = _copy(a, tmp_path / "b.db")
    with open_ledger(a) as lg:
        assert lg.plant("ax").samples == 1984
        fam, _, _ = lg.numeric_setup("ax")
        assert len(fam) >= 2000
        lg.verify()
    seen = []
    with open_ledger(b) as lg:
        lg.verify(cluster=client, progress=lambda d, n, w: seen.append((d, n)))
    assert seen[-1][1] >= 4          # one revision, several chunks of its family
    assert _rows(a) == _rows(b)


def test_a_worker_killed_mid_run_loses_and_duplicates_nothing(tmp_path, monkeypatch):
    from ledger.verification.cluster import DaskCluster

    monkeypatch.setattr(DaskCluster, "least_work", 200)   # more, smaller tasks
    src = tmp_path / "src.db"
    _small_ledger(src, revisions=40, samples=30)
    ref = _copy(src, tmp_path / "ref.db")
    with open_ledger(ref) as lg:
        lg.verify()
    # no retry of a task whose worker died: the run must stop and the rerun complete it
    cluster, client = _local_cluster(**{"distributed.scheduler.allowed-failures": 0})
    try:
        pids = sorted(client.run(os.getpid).values())
        killed = []

        def progress(done, total, what):
            if done == 1 and not killed:
                os.kill(pids[0], signal.SIGKILL)
                killed.append(total)

        outcome = "completed"
        with open_ledger(src) as lg:
            try:
                lg.verify(cluster=client, progress=progress)
            except ClusterError as e:
                outcome = "stopped"
                assert "run verify again" in str(e)
        assert killed and killed[0] > 2, "the worker was not killed mid-run"
        db = sqlite3.connect(src)
        per_rev = db.execute("SELECT revision_id, COUNT(*) FROM result GROUP BY revision_id"
                             ).fetchall()
        db.close()
        assert all(n == len(REQUIREMENTS) for _, n in per_rev), per_rev  # all or nothing
        client.wait_for_workers(2, timeout=300)  # the nanny restarts the killed worker
        with open_ledger(src) as lg:
            rest = lg.verify(cluster=client)
            assert len(rest) == 40 - len(per_rev)
            assert lg.verify(cluster=client) == []
        print(f"\nworker killed after 1 of {killed[0]} tasks: run {outcome} with "
              f"{len(per_rev)} of 40 revisions recorded; the rerun recorded {len(rest)}")
    finally:
        client.close()
        cluster.close()
    assert _rows(src) == _rows(ref)   # nothing lost, nothing twice, the same numbers


def test_a_task_recorded_twice_writes_nothing_twice(tmp_path):
    from ledger.verification.plan import plan_loops
    from ledger.verification.record import write_results
    from ledger.verification.units import Assembly, make_units, run_unit

    path = tmp_path / "t.db"
    _small_ledger(path, revisions=2, samples=2)
    with open_ledger(path) as lg:
        with lg.store.reading() as s:
            plans = plan_loops(s)
        units, todos = make_units(plans, 1)
        asm = Assembly(plans, units, todos)
        (_, res), = [run_unit(u) for u in units[:1]]
        (i,) = asm.add(units[0], res)
        payloads, _ = asm.payloads(i)
        plan, cached = plans[i]
        for _ in range(2):   # e.g. a retried task whose first result also arrived
            lg.store.write(lambda s: write_results(s, plan, plan.revision_id, payloads,
                                                   set(payloads) - set(cached)))
        rows, cache = _rows(path)
        assert len(rows) == len(REQUIREMENTS) and len(cache) == len(REQUIREMENTS)
        assert len(lg.verify()) == 1          # the other revision only
        from ledger.audit import audit

        assert audit(lg).ok


def test_workers_of_another_engine_version_are_refused(tmp_path, client, monkeypatch):
    import ledger.engine.results as m

    path = tmp_path / "t.db"
    _small_ledger(path, revisions=6, samples=4)
    real = m.ENGINE_VERSION
    client.run(exec, "import ledger.engine.results as m; m.ENGINE_VERSION = 'engine-test'")
    try:
        with open_ledger(path) as lg, pytest.raises(ClusterError, match="engine-test"):
            lg.verify(cluster=client)
        assert _rows(path) == ([], [])   # nothing recorded from the other engine
        # this process on the same (changed) engine: accepted, fingerprints of that engine
        monkeypatch.setattr(m, "ENGINE_VERSION", "engine-test")
        ref = _copy(path, tmp_path / "ref.db")
        with open_ledger(ref) as lg:
            lg.verify()
        with open_ledger(path) as lg:
            assert len(lg.verify(cluster=client)) == 6
    finally:
        client.run(exec, f"import ledger.engine.results as m; m.ENGINE_VERSION = {real!r}")
    rows, cache = _rows(path)
    assert {r[-1] for r in rows} == {"engine-test"} and {c[-1] for c in cache} == {"engine-test"}
    assert (rows, cache) == _rows(ref)


def test_engine_change_reverifies_every_revision_on_the_cluster(tmp_path, client, monkeypatch):
    """An engine version change: every revision of a verified ledger is verified again on the
    cluster, beside the old results, bitwise as in-process (issue 18, tests)."""
    import ledger.engine.results as m

    a = tmp_path / "a.db"
    _small_ledger(a, revisions=6, samples=4)
    with open_ledger(a) as lg:
        assert len(lg.verify()) == 6
    b = _copy(a, tmp_path / "b.db")
    old = _rows(a)
    real = m.ENGINE_VERSION
    monkeypatch.setattr(m, "ENGINE_VERSION", "engine-next")
    client.run(exec, "import ledger.engine.results as m; m.ENGINE_VERSION = 'engine-next'")
    try:
        with open_ledger(a) as lg:
            ref = lg.verify()
        with open_ledger(b) as lg:
            got = lg.verify(cluster=client)
            assert not lg.verify(cluster=client)      # nothing left
    finally:
        client.run(exec, f"import ledger.engine.results as m; m.ENGINE_VERSION = {real!r}")
    assert len(ref) == len(got) == 6                  # every revision, not only the tip
    assert _rows(a) == _rows(b)
    rows, cache = _rows(b)
    assert len(rows) == 2 * len(old[0]) and len(cache) == 2 * len(old[1])
    assert [r for r in rows if r[-1] == real] == old[0]    # the old results stay as they were


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _env(**extra) -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(ROOT), env.get("PYTHONPATH", "")]))
    env.update(extra)
    return env


def _stop(procs) -> None:
    for p in procs:
        if p.poll() is None:
            p.terminate()
    for p in procs:
        try:
            p.wait(timeout=60)
        except subprocess.TimeoutExpired:
            p.kill()
            p.wait(timeout=30)


def test_the_cli_on_a_separately_started_scheduler_and_two_workers(tmp_path):
    path = tmp_path / "t.db"
    _small_ledger(path)
    ref = _copy(path, tmp_path / "ref.db")
    with open_ledger(ref) as lg:
        lg.verify()
    port = _free_port()
    address = f"tcp://127.0.0.1:{port}"
    logs = open(tmp_path / "dask.log", "w")
    procs = [subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_scheduler",
                               "--host", "127.0.0.1", "--port", str(port), "--no-dashboard"],
                              env=_env(), stdout=logs, stderr=logs)]
    try:
        for _ in range(2):
            procs.append(subprocess.Popen(
                [sys.executable, "-m", "distributed.cli.dask_worker", address, "--nthreads", "1",
                 "--host", "127.0.0.1", "--no-dashboard"], env=_env(), stdout=logs, stderr=logs))
        # the address from $LOOPLEDGER_CLUSTER (the CLI waits for the scheduler and a worker)
        out = subprocess.run([sys.executable, "-m", "ledger", "verify"], capture_output=True,
                             text=True, timeout=600, cwd=tmp_path,
                             env=_env(LOOPLEDGER_DB=str(path), LOOPLEDGER_CLUSTER=address))
        assert out.returncode == 0, out.stderr
        assert out.stdout.startswith("verified 24 revision(s): 96 result(s) written")
        last = out.stderr.strip().splitlines()[-1]
        assert last.startswith("verifying: ") and "tasks/s" in last, out.stderr
        done, total = last.split(": ")[1].split(" tasks")[0].split("/")
        assert done == total
    finally:
        _stop(procs[1:])
        _stop(procs[:1])
        logs.close()
    assert _rows(path) == _rows(ref)


def test_the_cli_starts_and_stops_a_local_cluster(tmp_path):
    path = tmp_path / "t.db"
    _small_ledger(path, revisions=8, samples=4)
    ref = _copy(path, tmp_path / "ref.db")
    with open_ledger(ref) as lg:
        lg.verify()
    out = subprocess.run([sys.executable, "-m", "ledger", "verify", "--cluster", "local:2"],
                         capture_output=True, text=True, timeout=600, cwd=tmp_path,
                         env=_env(LOOPLEDGER_DB=str(path)))
    assert out.returncode == 0, out.stderr
    assert out.stdout.startswith("verified 8 revision(s)")
    assert _rows(path) == _rows(ref)


@pytest.fixture
def cli(tmp_path, monkeypatch):
    from typer.testing import CliRunner

    from ledger.cli import app

    path = tmp_path / "t.db"
    _small_ledger(path, revisions=2, samples=2)
    monkeypatch.setenv("LOOPLEDGER_DB", str(path))
    monkeypatch.delenv("LOOPLEDGER_CLUSTER", raising=False)
    runner = CliRunner()
    return lambda *args: runner.invoke(app, list(args)), path


def test_without_the_extra_the_option_names_it_in_one_line(cli, monkeypatch):
    call, path = cli
    monkeypatch.setitem(sys.modules, "distributed", None)   # import distributed -> ImportError
    res = call("verify", "--cluster", "local:2")
    assert res.exit_code == 1
    assert res.output == ("error: --cluster needs the optional 'cluster' extra "
                          "(dask[distributed]): pip install 'loopledger[cluster]'\n")
    monkeypatch.setenv("LOOPLEDGER_CLUSTER", "tcp://127.0.0.1:1")
    assert call("verify").exit_code == 1
    assert _rows(path) == ([], [])


@pytest.mark.parametrize("args, message", [
    (["--cluster", "local:2", "--workers", "2"], "give --workers or --cluster, not both"),
    (["--cluster", "local:x"], "give local:N with N a whole number"),
    (["--cluster", "local:0"], "give local:N with N a whole number"),
    (["--cluster", " "], "--cluster needs an address"),
])
def test_bad_cluster_options_are_refused_before_any_work(cli, args, message):
    call, path = cli
    res = call("verify", *args)
    assert res.exit_code == 1 and message in res.output and len(res.output.splitlines()) == 1
    assert _rows(path) == ([], [])


def test_an_unreachable_scheduler_is_one_line(cli, monkeypatch):
    import ledger.verification.cluster as c

    call, path = cli
    monkeypatch.setitem(c.DaskCluster.__init__.__kwdefaults__, "timeout", 2.0)
    port = _free_port()   # nothing listens there
    res = call("verify", "--cluster", f"tcp://127.0.0.1:{port}")
    assert res.exit_code == 1 and res.output.startswith("error: cannot use the Dask cluster at")
    assert len(res.output.splitlines()) == 1, res.output
    assert _rows(path) == ([], [])
