"""``loopledger gate``: exit 0 only when every applicable requirement on the chosen revisions
passes or is explicitly excluded; fail, error, stale and unverified cells each give one line and
exit 1.  The loop is the type-1 servo L = K/(s(s+1)): its phase margin is
atan(1/w_c) with w_c sqrt(1 + w_c^2) = K, i.e. w_c^2 = (sqrt(1 + 4 K^2) - 1)/2 (closed form,
common practice, no source): 51.83 deg at K = 1 and 38.67 deg at K = 2."""

from __future__ import annotations

import json

import pytest
from typer.testing import CliRunner

from ledger.api import open_ledger
from ledger.cli import app
from ledger.history.gate import gate


def _ledger(db_url):
    lg = open_ledger(db_url, create=True, author="tester")
    lg.add_plant("p", "K/(s*(s+1))", params={"K": 1.0})
    lg.add_loop("x", "p")
    lg.add_requirement("X-1", title="Phase margin", statement="PM at least 45 deg.",
                       metric="phase_margin", limit=">= 45 deg", loops=["x"])
    lg.add_requirement("X-2", title="Stable", statement="The loop is stable.",
                       metric="stable", limit="true", loops=["x"])
    return lg


def _run(db_url, *args):
    return CliRunner().invoke(app, ["--db", db_url, "gate", *args])


def test_gate_holds_then_a_plant_change_fails_it_until_verify(db_url):
    with _ledger(db_url) as lg:
        lg.add_revision("x", "1", rationale="unity gain: PM 51.83 deg")
        assert gate(lg).ok
    res = _run(db_url)
    assert res.exit_code == 0, res.output
    assert "gate holds: 2 of 2" in res.output
    with open_ledger(db_url) as lg:
        lg.add_plant("p", "K/(s*(s+1))", params={"K": 1.05})  # a new plant version
    res = _run(db_url)
    assert res.exit_code == 1
    lines = [ln for ln in res.output.splitlines() if ln.startswith("X-")]
    assert len(lines) == 2 and all(" x/r1 stale " in ln for ln in lines), res.output
    with open_ledger(db_url) as lg:
        lg.verify()
    assert _run(db_url).exit_code == 0


def test_failing_cell_is_named_with_value_and_limit_and_can_be_excluded(db_url):
    with _ledger(db_url) as lg:
        lg.add_revision("x", "2", rationale="more gain: PM 38.67 deg")
    res = _run(db_url)
    assert res.exit_code == 1
    line = next(ln for ln in res.output.splitlines() if ln.startswith("X-1"))
    assert "x/r1 fail" in line and "limit >= 45 deg" in line and "38.67 deg" in line, line
    res = _run(db_url, "--exclude", "X-1")
    assert res.exit_code == 0 and "excluded: X-1" in res.output, res.output
    res = _run(db_url, "--json")
    doc = json.loads(res.stdout)
    assert res.exit_code == 1 and doc["ok"] is False and doc["passing"] == 1
    assert [(c["requirement"], c["state"]) for c in doc["offending"]] == [("X-1", "fail")]


def test_unverified_revision_fails_and_an_older_passing_one_can_be_chosen(db_url):
    with _ledger(db_url) as lg:
        lg.add_revision("x", "1", rationale="unity gain")
        lg.add_revision("x", "0.9", rationale="recorded, not verified", verify=False)
    res = _run(db_url)
    assert res.exit_code == 1 and res.output.count(" x/r2 unverified ") == 2, res.output
    assert _run(db_url, "--revision", "x:r1").exit_code == 0


@pytest.mark.parametrize("args, message", [
    (["--exclude", "NOPE"], "no requirement with ID 'NOPE'"),
    (["--revision", "x"], "must look like LOOP:LABEL"),
])
def test_bad_input_is_one_line_and_not_a_pass(db_url, args, message):
    with _ledger(db_url) as lg:
        lg.add_revision("x", "1", rationale="unity gain")
    res = _run(db_url, *args)
    assert res.exit_code != 0 and message in res.output, res.output
