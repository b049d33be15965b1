"""Ledger workloads: incremental re-verification, parallel re-verification and a synthetic
ledger of 10,000 revisions x 100 requirements (one million results) for the read side.

Nothing here asserts on time; every function returns figures for ``run.py`` to print.
"""

from __future__ import annotations

import asyncio
import os
import random
import shutil
import sqlite3
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

from . import scenario as S

__all__ = ["build_small_ledger", "incremental", "parallel", "build_scale_ledger", "scale_reads",
           "ui_start"]


def _controller(i: int) -> str:
    """A distinct controller per revision (small, seeded steps around the design)."""
    g = S.CONTROLLER_GAINS
    k = 1.0 + 0.002 * i
    return (f"pid(kp={g['kp'] * k:.6g}, ki={g['ki'] * (2 - k):.6g}, kd={g['kd']:.6g}, "
            f"tf={g['tf']:.6g})")


def _setup(lg, *, samples: int, seed: int = 1) -> None:
    lg.auto_verify = False
    lg.add_plant("pipette", S.PLANT_TEXT, params=S.PARAMS, fidelity={"full-order": S.FULL_TEXT},
                 samples=samples, seed=seed)
    lg.add_loop("pipette-z", "pipette")
    for key, metric, limit in S.REQUIREMENTS:
        lg.add_requirement(key, title=f"{metric} of the pipette axis",
                           statement=f"{metric} {limit} over the plant family", metric=metric,
                           limit=limit, loops=["pipette-z"])


def build_small_ledger(path: Path, *, revisions: int, samples: int) -> dict:
    """A ledger of ``revisions`` revisions x the 14 scenario requirements, built with
    ``add_revision(verify=False)`` and one ``verify()``."""
    from ledger.api import open_ledger

    if path.exists():
        path.unlink()
    t0 = time.perf_counter()
    with open_ledger(path, create=True, author="bench") as lg:
        _setup(lg, samples=samples)
        for i in range(revisions):
            lg.add_revision("pipette-z", _controller(i), rationale=f"step {i}", verify=False)
        t1 = time.perf_counter()
        lg.verify()
        t2 = time.perf_counter()
        return {"records_s": t1 - t0, "verify_s": t2 - t1, "requests": lg.kernel_requests,
                "revisions": revisions, "variants": samples + 6}


def incremental(path: Path) -> dict:
    """Change one requirement's limit, then add one revision; count kernel requests."""
    from ledger.api import open_ledger

    with open_ledger(path, author="bench") as lg:
        lg.auto_verify = True
        before = lg.kernel_requests
        t0 = time.perf_counter()
        lg.edit_requirement("PZ-08", limit=">= 50 deg", note="tighter phase margin")
        t_edit = time.perf_counter() - t0
        n_edit = lg.kernel_requests - before
        res = lg.results("pipette-z")
        judged = sum(1 for r in res if r.requirement == "PZ-08" and not r.stale)
        before = lg.kernel_requests
        t0 = time.perf_counter()
        lg.add_revision("pipette-z", _controller(10_000), rationale="one more step")
        t_add = time.perf_counter() - t0
        n_add = lg.kernel_requests - before
    return {"rethreshold_s": t_edit, "rethreshold_requests": n_edit, "rejudged_tip": judged,
            "add_s": t_add, "add_requests": n_add}


def parallel(path: Path, tmp: Path, *, repeats: int = 1) -> dict:
    """Re-verify every revision after a plant version change, 1 worker vs 2 (same work: copies
    of one ledger, the same new plant version in each).  With ``repeats`` > 1 the two are run
    alternately and the best time of each is kept (the machine is shared)."""
    from ledger.api import open_ledger

    out = {1: None, 2: None}
    for rep in range(repeats):
        for workers in (1, 2):
            copy = tmp / f"parallel-{workers}-{rep}.db"
            shutil.copyfile(path, copy)
            for suffix in ("-wal", "-shm"):
                if Path(str(path) + suffix).exists():
                    shutil.copyfile(str(path) + suffix, str(copy) + suffix)
            with open_ledger(copy, author="bench") as lg:
                lg.auto_verify = False
                info = lg.plant("pipette")
                lg.add_plant("pipette", S.PLANT_TEXT, params=S.PARAMS,
                             fidelity={"full-order": S.FULL_TEXT}, samples=info.samples,
                             seed=2, note="new sample seed")
                t0 = time.perf_counter()
                rep_list = lg.verify(workers=workers)
                dt = time.perf_counter() - t0
            if out[workers] is None or dt < out[workers]["seconds"]:
                out[workers] = {"seconds": dt, "revisions": len(rep_list),
                                "requests": sum(r["computed"] for r in rep_list)}
            copy.unlink()
    out["speedup"] = out[1]["seconds"] / out[2]["seconds"]
    return out


# -- the synthetic large ledger ---------------------------------------------------------------

_METRICS = [m for _, m, _ in S.REQUIREMENTS]
_LIMITS = {m: lim for _, m, lim in S.REQUIREMENTS}


def build_scale_ledger(path: Path, *, revisions: int, requirements: int,
                       failing_run: int = 50, seed: int = 7) -> dict:
    """Schema through ``open_ledger(create=True)``, plant/loop/requirements through the API,
    then revisions and results by ``executemany`` in one transaction.  Revisions form one
    lineage chain; requirement index 7 fails on the last ``failing_run`` revisions, every other
    result passes.  Results carry their row hashes and one result batch per revision, as the
    ledger writes them; chain links are not written for the bulk revisions and batches (the
    audit is not part of this workload)."""
    from ledger.api import open_ledger
    from ledger.chain import RESULT_FIELDS, batch_digest, result_row_hash, subjects_text

    for suffix in ("", "-wal", "-shm"):
        p = Path(str(path) + suffix)
        if p.exists():
            p.unlink()
    t0 = time.perf_counter()
    with open_ledger(path, create=True, author="bench") as lg:
        lg.auto_verify = False
        lg.add_plant("pipette", S.PLANT_TEXT, params=S.PARAMS,
                     fidelity={"full-order": S.FULL_TEXT}, samples=994, seed=1)
        lg.add_loop("pipette-z", "pipette")
        for k in range(requirements):
            m = _METRICS[k % len(_METRICS)]
            lg.add_requirement(f"PZ-{k + 1:03d}", title=f"{m} #{k + 1}",
                               statement=f"{m} {_LIMITS[m]}", metric=m, limit=_LIMITS[m],
                               loops=["pipette-z"])
    t_api = time.perf_counter() - t0
    rng = random.Random(seed)
    con = sqlite3.connect(path)
    try:
        con.execute("PRAGMA foreign_keys=ON")
        (loop_id,) = con.execute("SELECT id FROM loop WHERE name='pipette-z'").fetchone()
        (pv_id,) = con.execute("SELECT id FROM plant_version").fetchone()
        rvs = con.execute("SELECT id, limit_value FROM requirement_version ORDER BY id").fetchall()
        start = datetime(2026, 1, 1, tzinfo=timezone.utc)

        def stamp(i):
            return (start + timedelta(minutes=i)).strftime("%Y-%m-%d %H:%M:%S.%f")

        t1 = time.perf_counter()
        con.execute("BEGIN")
        rev_rows = []
        for i in range(1, revisions + 1):
            ctext = _controller(i % 400)
            rev_rows.append((i, loop_id, f"r{i}", i, i - 1 if i > 1 else None, "bench",
                             f"synthetic step {i}", ctext, ctext.replace(" ", ""),
                             f"{rng.getrandbits(256):064x}", stamp(i)))
        con.executemany(
            "INSERT INTO revision (id, loop_id, label, seq, parent_id, author, rationale, "
            "controller_text, controller_canonical, content_hash, created_at) "
            "VALUES (?,?,?,?,?,?,?,?,?,?,?)", rev_rows)
        fail_from = revisions - failing_run + 1
        # each revision's results are one batch, with row hashes as the ledger writes them
        # (the synthetic metric keys name no cached metric value)
        for i in range(1, revisions + 1):
            ts = stamp(i)
            rows, hashes, keys = [], [], {}
            for k, (rv_id, lim) in enumerate(rvs):
                fails = k == 7 and i >= fail_from
                lim = lim or 1.0
                h = (-0.1 if fails else 0.05 + 0.5 * rng.random()) * abs(lim)
                row = (i, rv_id, pv_id, "fail" if fails else "pass", float(lim + h), h,
                       h / abs(lim), "corner:K-,tau_m+", 0.0 if fails else 1.0, 1000, "",
                       f"{rng.getrandbits(256):064x}", "engine-1", ts)
                rh = result_row_hash(dict(zip(RESULT_FIELDS, row)))
                hashes.append(rh)
                keys[row[11]] = None
                rows.append(row + (i, rh))
            con.execute("INSERT INTO result_batch (id, revision_id, results, subjects, digest, "
                        "created_at) VALUES (?,?,?,?,?,?)",
                        (i, i, len(rows), subjects_text((rv, pv_id) for rv, _ in rvs),
                         batch_digest(hashes, keys), ts))
            con.executemany(
                "INSERT INTO result (revision_id, requirement_version_id, plant_version_id, "
                "verdict, value, headroom, headroom_fraction, worst_variant, pass_fraction, "
                "variants, reason, metric_key, engine_version, created_at, batch_id, row_hash) "
                "VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)", rows)
        con.execute("COMMIT")
        t_bulk = time.perf_counter() - t1
        con.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        (n,) = con.execute("SELECT count(*) FROM result").fetchone()
    finally:
        con.close()
    return {"api_s": t_api, "bulk_s": t_bulk, "results": n, "revisions": revisions,
            "requirements": requirements, "failing_key": f"PZ-{8:03d}",
            "size_mb": os.path.getsize(path) / 1e6}


class _QueryCounter:
    """Counts SQL statements the ledger's engines execute (SQLAlchemy cursor events)."""

    def __init__(self, lg):
        from sqlalchemy import event

        self.n = 0
        self._engines = lg.store.engines
        for e in self._engines:
            event.listen(e, "before_cursor_execute", self._hit)

    def _hit(self, *args):
        self.n += 1

    def close(self):
        from sqlalchemy import event

        for e in self._engines:
            event.remove(e, "before_cursor_execute", self._hit)


def _queries(lg, fn) -> int:
    qc = _QueryCounter(lg)
    try:
        fn()
    finally:
        qc.close()
    return qc.n


def _best(fn, repeats: int) -> tuple[float, float, object]:
    """(first call s, best of ``repeats`` s, last value)."""
    times, val = [], None
    for _ in range(repeats):
        t0 = time.perf_counter()
        val = fn()
        times.append(time.perf_counter() - t0)
    return times[0], min(times), val


def scale_reads(path: Path, *, failing_key: str, repeats: int = 3, slow_repeats: int = 3) -> dict:
    """Open, matrix of the latest 20 revisions, diff tip vs parent, first failing revision."""
    from ledger.api import open_ledger
    from ledger.history.diff import diff
    from ledger.history.matrix import build_matrix
    from ledger.history.since import first_failing

    out = {}
    t0 = time.perf_counter()
    lg = open_ledger(path, author="bench")
    out["open"] = (time.perf_counter() - t0,) * 2
    try:
        tip = lg.loop("pipette-z").tip
        n = int(tip[1:])
        sel = [("pipette-z", f"r{i}") for i in range(n - 19, n + 1)]
        first, best, m = _best(lambda: build_matrix(lg, sel), repeats)
        out["matrix20"] = (first, best)
        out["matrix_entries"] = len(m.entries)
        first, best, d = _best(lambda: diff(lg, "pipette-z"), repeats)
        out["diff"] = (first, best)
        out["diff_changes"] = len(d.changes)
        first, best, run = _best(lambda: first_failing(lg, "pipette-z", failing_key),
                                slow_repeats)
        out["first_failing"] = (first, best)
        out["first_failing_label"] = run.first.label if run.first else None
        out["failing_run_length"] = len(run.run)
        try:
            first, best, _ = _best(lambda: lg.lineage("pipette-z"), 1)
            out["lineage"] = f"{first * 1e3:.1f} ms"
        except RecursionError as e:
            out["lineage"] = f"failed: RecursionError ({e})"
        out["queries"] = {
            "matrix20": _queries(lg, lambda: build_matrix(lg, sel)),
            "diff": _queries(lg, lambda: diff(lg, "pipette-z")),
            "first_failing": _queries(lg, lambda: first_failing(lg, "pipette-z", failing_key)),
            "results (one revision)": _queries(lg, lambda: lg.results("pipette-z")),
            "requirements()": _queries(lg, lambda: lg.requirements()),
            "revisions() (whole loop)": _queries(lg, lambda: lg.revisions("pipette-z")),
        }
    finally:
        lg.close()
    return out


def ui_start(path: Path, *, timeout: float = 300.0) -> dict:
    """Headless UI: seconds until the first screen is mounted (``run_test`` entered) and until
    the lineage view shows its data (tree filled by its worker).  A worker that fails is
    reported with its exception (``error``), not raised."""
    out: dict = {"mounted": None, "data": None, "error": None}

    async def go():
        t0 = time.perf_counter()
        from ledger.tui.app import LedgerApp
        from textual.css.query import NoMatches
        from textual.widgets import Tree

        app = LedgerApp(str(path))
        async with app.run_test(size=(120, 40)) as pilot:
            out["mounted"] = time.perf_counter() - t0
            while time.perf_counter() - t0 < timeout:
                await pilot.pause(0.02)
                if app._exception is not None:
                    break
                try:
                    tree = app.screen.query_one(Tree)
                except NoMatches:  # the first screen is not composed yet
                    continue
                if tree.root.children and tree.root.children[0].children:
                    out["data"] = time.perf_counter() - t0
                    break
            await pilot.pause(0.5)   # let the filled tree render once

    import contextlib
    import io

    from textual.worker import WorkerFailed

    try:
        with contextlib.redirect_stderr(io.StringIO()), contextlib.redirect_stdout(io.StringIO()):
            asyncio.run(go())
    except WorkerFailed as e:
        cause = e.error
        out["error"] = f"{type(cause).__name__}: {cause} at {_innermost(cause)}"
    except RecursionError as e:      # raised on the UI side (rendering, message handling)
        out["error"] = f"RecursionError at {_innermost(e)}"
    return out


def _innermost(exc: BaseException, n: int = 3) -> str:
    """The innermost ``n`` frames of an exception as ``file:function`` (for the report)."""
    import traceback

    frames = traceback.extract_tb(exc.__traceback__)[-n:]
    return " < ".join(f"{f.filename.rsplit('/', 1)[-1]}:{f.name}" for f in reversed(frames))
