"""Several processes writing to one ledger at once, and verification killed mid-run.

Figures (processes x records) are printed with ``-s`` and quoted in docs/operations.md.
"""

from __future__ import annotations

import multiprocessing as mp
import os
import random
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from ledger.api import open_ledger

WRITERS = 4
REVISIONS_EACH = 10
EDITS_EACH = 4


def _writer(url: str, wid: int, q) -> None:
    try:
        lg = open_ledger(url, author=f"writer{wid}")
        for i in range(REVISIONS_EACH):
            lg.add_revision("p", f"gain({1 + wid * 0.01 + i * 0.001:.4f})",
                            rationale=f"writer {wid} change {i}", verify=False)
            if i < EDITS_EACH:
                lg.edit_requirement("R-1", statement=f"edited by {wid} #{i}")
        q.put(("ok", wid, lg.retries))
        lg.close()
    except BaseException as e:  # noqa: BLE001 - report anything to the parent
        q.put(("err", wid, repr(e)))


def _base(url):
    lg = open_ledger(url, create=True, author="setup")
    lg.add_plant("p", "K/(s*(s+1))", params={"K": 1.0})
    lg.add_loop("p", "p")
    lg.add_requirement("R-1", title="pm", statement="start", metric="phase_margin",
                       limit=">= 45 deg", loops=["p"])
    return lg


def test_concurrent_writers_lose_nothing(db_url):
    lg = _base(db_url)
    lg.close()
    ctx = mp.get_context("spawn")
    q = ctx.Queue()
    procs = [ctx.Process(target=_writer, args=(db_url, w, q)) for w in range(WRITERS)]
    for p in procs:
        p.start()
    for p in procs:
        p.join(timeout=240)
    outcomes = [q.get(timeout=5) for _ in procs]
    assert all(o[0] == "ok" for o in outcomes), outcomes
    lg = open_ledger(db_url)
    revs = lg.revisions("p")
    n = WRITERS * REVISIONS_EACH
    assert len(revs) == n
    assert sorted(r.seq for r in revs) == list(range(1, n + 1))
    assert len({r.label for r in revs}) == n
    labels = {r.label for r in revs}
    assert all(r.parent is None or r.parent in labels for r in revs)
    # every writer's every revision is there
    for w in range(WRITERS):
        mine = [r for r in revs if r.rationale.startswith(f"writer {w} ")]
        assert len(mine) == REVISIONS_EACH
    hist = lg.requirement_history("R-1")
    assert [h.version for h in hist] == list(range(1, 2 + WRITERS * EDITS_EACH))
    retries = sum(o[2] for o in outcomes)
    print(f"\n{WRITERS} writers x ({REVISIONS_EACH} revisions + {EDITS_EACH} requirement "
          f"versions): nothing lost; {retries} bounded retries on {db_url.split(':')[0]}")
    from ledger.audit import audit

    report = audit(lg)
    assert report.ok, report
    lg.close()


SCRIPT = r"""
import sys
from ledger.api import open_ledger
lg = open_ledger(sys.argv[1])
print("started", flush=True)
lg.verify()
print("finished", flush=True)
"""


@pytest.mark.parametrize("seed", [1, 2])
def test_killed_verification_leaves_ledger_consistent(tmp_path, seed):
    """SIGKILL at a random point of a verification run: the file passes integrity_check, no
    revision has half its results, and rerunning computes exactly the missing work."""
    path = tmp_path / "k.db"
    lg = _base(str(path))
    lg.add_requirement("R-2", title="gm", statement="gm", metric="gain_margin", limit=">= 6 dB",
                       loops=["p"])
    lg.add_requirement("R-3", title="os", statement="os", metric="overshoot", limit="<= 20 %",
                       loops=["p"])
    for i in range(30):
        lg.add_revision("p", f"pid(kp={0.5 + 0.02 * i:.3f}, ki=0.1, kd=0.3, tf=0.01)",
                        rationale=f"step {i}", verify=False)
    lg.close()
    env = dict(os.environ)
    proc = subprocess.Popen([sys.executable, "-c", SCRIPT, str(path)], stdout=subprocess.PIPE,
                            text=True, env=env)
    assert proc.stdout.readline().strip() == "started"
    # wait until verification is under way (some results committed), then kill at random
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        with sqlite3.connect(path, timeout=30) as probe:
            if probe.execute("SELECT COUNT(*) FROM result").fetchone()[0] > 0:
                break
        time.sleep(0.02)
    time.sleep(random.Random(seed).uniform(0.0, 0.4))
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=30)
    db = sqlite3.connect(path)
    assert db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    per_rev = db.execute("SELECT revision_id, COUNT(*) FROM result GROUP BY revision_id").fetchall()
    db.close()
    assert all(n == 3 for _, n in per_rev), per_rev  # all or nothing per revision
    done = len(per_rev)
    lg = open_ledger(path)
    rep = lg.verify()
    assert len(rep) == 30 - done
    assert all(r["results"] == 3 for r in rep)
    assert lg.verify() == []
    print(f"\nkilled after {done} of 30 revisions verified; rerun completed the other {30 - done}")
    lg.close()
