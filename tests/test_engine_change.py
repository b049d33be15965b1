"""An engine version change makes every result stale and ``verify`` recomputes every revision
(issue 18: "an engine version change re-verifying every revision").

The old results stay (append-only); the new ones sit beside them under the same subject with
the new engine version; values of an unchanged engine agree exactly.  Rules of the ledger
itself (docs/history.md; common practice, no outside source).
"""

from __future__ import annotations

import pytest

import ledger.engine.results as engine_results
from ledger.audit import audit
from ledger.history.gate import gate
from ledger.store import results as results_db


def _rows(lg):
    with lg.reading() as s:
        from ledger.store.models import Result

        return sorted((r.revision_id, r.requirement_version_id, r.plant_version_id,
                       r.engine_version, r.verdict, r.value)
                      for r in s.query(Result))  # noqa: the test reads the table directly


@pytest.fixture
def two_revisions(populated):
    lg = populated
    lg.add_requirement("PZ-2", title="Gain margin", statement="GM at least 6 dB.",
                       metric="gain_margin", limit=">= 6 dB", loops=["pz"], status="approved")
    lg.add_revision("pz", "pid(kp=0.5, ki=4, kd=0.006, tf=0.0008)", rationale="more gain")
    lg.verify()
    return lg


def test_engine_change_restales_and_reverifies_every_revision(two_revisions, monkeypatch):
    lg = two_revisions
    before = _rows(lg)
    assert before and {r[3] for r in before} == {engine_results.ENGINE_VERSION}
    assert not lg.verify()                       # up to date
    fails_before = {(c.requirement, c.revision) for c in gate(lg, "all").offending}
    assert all(c.state == "fail" for c in gate(lg, "all").offending)

    monkeypatch.setattr(engine_results, "ENGINE_VERSION", "engine-next")
    # every result is now stale; the gate goes red on it
    for info in lg.results("pz", include_stale=True):
        assert info.stale and info.verdict == "stale"
    g = gate(lg)
    assert not g.ok and {c.state for c in g.offending} == {"stale"}

    done = lg.verify()
    assert len(done) == 2                        # both revisions, not only the tip
    after = _rows(lg)
    old = [r for r in after if r[3] != "engine-next"]
    new = [r for r in after if r[3] == "engine-next"]
    assert old == before                         # nothing rewritten or removed
    # the same subjects, the same verdicts and values (the engine's code did not change)
    assert [r[:3] + r[4:] for r in new] == [r[:3] + r[4:] for r in before]
    assert all(not i.stale for i in lg.results("pz", include_stale=True))
    # the gate judges the new results as it judged the old ones
    assert {(c.requirement, c.revision) for c in gate(lg, "all").offending} == fails_before
    assert all(c.state == "fail" for c in gate(lg, "all").offending)
    assert not lg.verify()                       # idempotent: nothing left
    assert audit(lg).ok

    with lg.reading() as s:
        counts = results_db.verdict_counts(s, "pz")
    assert sum(c["stale"] for c in counts.values()) == 0


def test_back_to_the_old_engine_finds_its_results_again(two_revisions, monkeypatch):
    lg = two_revisions
    monkeypatch.setattr(engine_results, "ENGINE_VERSION", "engine-next")
    lg.verify()
    n = len(_rows(lg))
    monkeypatch.undo()
    # the old engine's results are current again: nothing to compute, nothing written
    assert not lg.verify()
    assert len(_rows(lg)) == n
    assert all(not i.stale for i in lg.results("pz", include_stale=True))


def test_a_schema_0009_ledger_takes_results_of_a_new_engine(tmp_path, monkeypatch):
    # Before migration 0010 a subject held one result whatever the engine; the upgraded
    # ledger takes a second result of another engine beside it and audits clean.
    import shutil
    import sqlite3
    from pathlib import Path

    from ledger.api import open_ledger

    path = tmp_path / "old.db"
    shutil.copy(Path(__file__).parent / "fixtures" / "ledger-0009.db", path)
    with sqlite3.connect(path) as db:
        old = db.execute("SELECT revision_id, requirement_version_id, plant_version_id, "
                         "engine_version FROM result").fetchall()
    assert old
    monkeypatch.setattr(engine_results, "ENGINE_VERSION", "engine-next")
    with open_ledger(path) as lg:
        assert lg.schema_action == "upgraded from 0009"
        lg.verify()
        rows = _rows(lg)
        assert audit(lg).ok
    subjects = {r[:3] for r in rows if r[3] == "engine-next"}
    assert {r[:3] for r in old} <= subjects      # each old subject judged again, beside it
    assert {r[:4] for r in old} <= {r[:4] for r in rows}
