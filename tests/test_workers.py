"""Worker processes end with their parent: a killed ``verify --workers 2`` leaves no worker
running (prctl(2) PR_SET_PDEATHSIG on Linux, a parent-id watcher elsewhere)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from ledger.api import open_ledger

ROOT = Path(__file__).resolve().parents[1]

pytestmark = pytest.mark.skipif(not Path("/proc/self/stat").exists(),
                                reason="reads the process table from /proc")


def _ppid_and_state(pid: int) -> tuple[int, str] | None:
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except (FileNotFoundError, ProcessLookupError):
        return None
    rest = stat[stat.rindex(")") + 2:].split()  # the command name may contain spaces
    return int(rest[1]), rest[0]


def _children(pid: int) -> set[int]:
    out = set()
    for d in os.listdir("/proc"):
        if d.isdigit():
            st = _ppid_and_state(int(d))
            if st and st[0] == pid:
                out.add(int(d))
    return out


def _alive(pid: int) -> bool:
    st = _ppid_and_state(pid)
    return st is not None and st[1] != "Z"


@pytest.fixture
def busy_ledger(tmp_path):
    """Enough work for two workers for several seconds: 12 revisions, 6 metrics, 300 variants."""
    path = tmp_path / "busy.db"
    with open_ledger(path, create=True, author="tester") as lg:
        lg.auto_verify = False
        lg.add_plant("p", "K/(s*(tau*s+1))", params={"K": {"nominal": 100.0, "tol": "20 %"},
                                                     "tau": {"nominal": 0.05, "tol": "20 %"}},
                     samples=300, seed=3)
        lg.add_loop("lp", "p", kind="position")
        for i, (metric, limit) in enumerate((("phase_margin", ">= 30 deg"),
                                             ("gain_margin", ">= 6 dB"),
                                             ("overshoot", "<= 20 %"),
                                             ("settling_time", "<= 1 s"),
                                             ("bandwidth", ">= 1 rad/s"),
                                             ("delay_margin", ">= 1 ms"))):
            lg.add_requirement(f"R-{i}", title=metric, statement=f"{metric} {limit}.",
                               metric=metric, limit=limit, loops=["lp"])
        for k in range(12):
            lg.add_revision("lp", f"pid(kp={0.2 + 0.05 * k}, ki=0.1, kd=0.01, tf=0.001)",
                            rationale=f"step {k}", verify=False)
    return path


def test_killed_verify_leaves_no_worker(busy_ledger):
    env = {**os.environ, "PYTHONPATH": str(ROOT), "LOOPLEDGER_AUTHOR": "tester"}
    proc = subprocess.Popen([sys.executable, "-m", "ledger", f"--db={busy_ledger}", "verify",
                             "--workers", "2"], env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE)
    workers: set[int] = set()
    try:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and proc.poll() is None:
            workers = {c for c in _children(proc.pid) if _alive(c)}
            if len(workers) >= 2:
                break
            time.sleep(0.05)
        assert proc.poll() is None and len(workers) >= 2, \
            f"verify finished before two workers were seen: {proc.stderr.read()!r}"
        time.sleep(0.3)  # let the workers reach their first task
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
        deadline = time.monotonic() + 10  # a bound on waiting, not a speed goal
        while time.monotonic() < deadline and any(_alive(w) for w in workers):
            time.sleep(0.1)
        survivors = [w for w in workers if _alive(w)]
        assert not survivors, f"workers {survivors} outlived their killed parent"
    finally:
        for w in workers:
            if _alive(w):
                os.kill(w, signal.SIGKILL)
        if proc.poll() is None:
            proc.kill()
            proc.wait()


def test_watcher_ends_a_process_whose_parent_died(tmp_path):
    """The fallback alone (no prctl): a grandchild armed with the watcher only ends once its
    parent is killed."""
    code = (
        "import os, sys, time\n"
        "sys.path.insert(0, sys.argv[1])\n"
        "import ledger.workers as w\n"
        "w._linux_death_signal = lambda: False\n"
        "pid = os.fork()\n"
        "if pid == 0:\n"
        "    w.die_with_parent(poll=0.05)\n"
        "    time.sleep(60)\n"
        "    os._exit(0)\n"
        "print(pid, flush=True)\n"
        "time.sleep(60)\n"
    )
    proc = subprocess.Popen([sys.executable, "-c", code, str(ROOT)], stdout=subprocess.PIPE,
                            text=True)
    child = int(proc.stdout.readline())
    try:
        time.sleep(0.3)
        assert _alive(child), "the child ended while its parent was still running"
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline and _alive(child):
            time.sleep(0.05)
        assert not _alive(child), "the watcher did not end the orphaned child"
    finally:
        if _alive(child):
            os.kill(child, signal.SIGKILL)
