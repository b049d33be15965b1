"""Shared fixtures: temporary ledgers on SQLite files."""

from __future__ import annotations

import pytest

from ledger.api import open_ledger

PLANT_TEXT = "K/(s*(tau_m*s+1))"
FULL_TEXT = "K/(s*(tau_m*s+1)*(tau_e*s+1))"
PLANT_PARAMS = {"K": {"nominal": 180.0, "tol": "10 %"}, "tau_m": {"nominal": 0.03, "tol": "20 %"},
                "tau_e": 0.0004}


@pytest.fixture
def ledger_path(tmp_path):
    return tmp_path / "t.db"


@pytest.fixture
def lg(ledger_path):
    ledger = open_ledger(ledger_path, create=True, author="tester")
    yield ledger
    ledger.close()


@pytest.fixture
def populated(lg):
    """A small ledger: one plant, one loop, two requirements, a revision."""
    lg.add_plant("pz", PLANT_TEXT, params=PLANT_PARAMS, fidelity={"full": FULL_TEXT})
    lg.add_loop("pz", "pz", kind="position")
    lg.add_requirement("SYS-1", title="Move and settle", statement="Moves settle in time.")
    lg.add_requirement("PZ-1", title="Phase margin", statement="PM at least 45 deg.",
                       metric="phase_margin", limit=">= 45 deg", parents=["SYS-1"], loops=["pz"],
                       status="approved")
    lg.add_revision("pz", "pid(kp=0.4, ki=4, kd=0.006, tf=0.0008)", rationale="first tuning")
    return lg
