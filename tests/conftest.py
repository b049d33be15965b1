"""Shared fixtures: temporary ledgers on SQLite files and, when a server is configured, on
PostgreSQL (a fresh database per test).

PostgreSQL cases need ``LOOPLEDGER_TEST_PG`` (an admin URL, e.g.
``postgresql+psycopg://postgres@127.0.0.1:55432/postgres``; ``. .ci/postgres`` starts a
throwaway cluster and sets it).  Without it they are skipped with that reason, except when
``LOOPLEDGER_REQUIRE_PG=1`` (CI), where a missing server fails the run.
"""

from __future__ import annotations

import os
import uuid

import pytest

from ledger.api import open_ledger

PLANT_TEXT = "K/(s*(tau_m*s+1))"
FULL_TEXT = "K/(s*(tau_m*s+1)*(tau_e*s+1))"
PLANT_PARAMS = {"K": {"nominal": 180.0, "tol": "10 %"}, "tau_m": {"nominal": 0.03, "tol": "20 %"},
                "tau_e": 0.0004}

PG_ADMIN_URL = os.environ.get("LOOPLEDGER_TEST_PG", "")
REQUIRE_PG = os.environ.get("LOOPLEDGER_REQUIRE_PG") == "1"
BACKENDS = ["sqlite", "postgresql"]

# Modules whose tests are numeric (engine, systems, units): CI runs them a second time under
# another BLAS set-up (see .ci/run), so a tolerance that holds on one kernel only fails there.
# A new numeric test module goes in this list.
NUMERIC_MODULES = {"test_blocks", "test_family", "test_family_scale", "test_freqresp", "test_loop",
                   "test_measure", "test_parser", "test_stability", "test_timeresp", "test_units",
                   "test_plant_units", "test_display", "test_plot_axes", "test_yieldbound",
                   "test_digital", "test_intersample",
                   "test_moves", "test_disturbance_offset", "test_feedforward"}
NUMERIC_MODULES |= {"test_measured"}
NUMERIC_MODULES |= {"test_rms"}
NUMERIC_MODULES |= {"test_sensitivity"}
NUMERIC_MODULES |= {"test_yield_ledger"}
NUMERIC_MODULES |= {"test_loop_views"}


def pytest_configure(config):
    config.addinivalue_line("markers", "numeric: numeric engine tests, also run under a second "
                            "BLAS set-up in CI")


def pytest_collection_modifyitems(config, items):
    for item in items:
        if item.module.__name__.rsplit(".", 1)[-1] in NUMERIC_MODULES:
            item.add_marker(pytest.mark.numeric)


def pg_database():
    """Create a fresh PostgreSQL database; return (url, drop_function)."""
    from sqlalchemy import create_engine, text
    from sqlalchemy.engine import make_url

    if not PG_ADMIN_URL:
        if REQUIRE_PG:
            pytest.fail("LOOPLEDGER_REQUIRE_PG=1 but LOOPLEDGER_TEST_PG is not set: "
                        "PostgreSQL must run in CI")
        pytest.skip("PostgreSQL not configured: set LOOPLEDGER_TEST_PG or run '. .ci/postgres'")
    name = f"ll_{uuid.uuid4().hex[:16]}"
    admin = create_engine(PG_ADMIN_URL, isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as c:
            c.execute(text(f'CREATE DATABASE "{name}"'))
    except Exception as e:  # noqa: BLE001 - report any connection failure clearly
        admin.dispose()
        if REQUIRE_PG:
            pytest.fail(f"PostgreSQL at {PG_ADMIN_URL} is not reachable: {e}")
        pytest.skip(f"PostgreSQL at {PG_ADMIN_URL} is not reachable")
    url = make_url(PG_ADMIN_URL).set(database=name).render_as_string(hide_password=False)

    def drop():
        with admin.connect() as c:
            c.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()

    return url, drop


@pytest.fixture(params=BACKENDS)
def db_url(request, tmp_path):
    """A ledger location on each back end: an SQLite file path or a fresh PostgreSQL URL."""
    if request.param == "sqlite":
        yield str(tmp_path / "t.db")
        return
    url, drop = pg_database()
    yield url
    drop()


@pytest.fixture(autouse=True)
def _private_prefs(tmp_path_factory, monkeypatch):
    """Display preferences (ledger.prefs) in a throwaway folder, never the user's."""
    monkeypatch.setenv("LOOPLEDGER_CONFIG_DIR", str(tmp_path_factory.mktemp("prefs")))


@pytest.fixture
def ledger_path(tmp_path):
    return tmp_path / "t.db"


@pytest.fixture
def lg(db_url):
    ledger = open_ledger(db_url, create=True, author="tester")
    yield ledger
    ledger.close()


@pytest.fixture
def sqlite_lg(ledger_path):
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
