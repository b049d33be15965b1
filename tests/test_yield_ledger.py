"""Yield with confidence in the ledger: the verdict of a requirement with a yield target at
the edge of its claim, the bound beside every pass fraction (results, CLI, exports, UI), the
target in spec files and requirement versions, and unchanged verdicts without a target.

References: the one-sided Clopper-Pearson lower bound is the ``1 - c`` quantile of
Beta(k, n - k + 1) (Clopper & Pearson, Biometrika 26, 1934), computed here by
``scipy.stats.beta.ppf`` (reference library), independently of ``ledger.yieldbound``.
"""

from __future__ import annotations

import json
import shutil
import sqlite3
from pathlib import Path

import numpy as np
import pytest
from scipy.stats import beta

from ledger.api import open_ledger
from ledger.errors import LedgerError
from ledger.verification.compute import judge_payload
from ledger.verification.plan import Check

ROOT = Path(__file__).resolve().parents[1]
PLANT = "K/(s*(tau_m*s+1))"
PARAMS = {"K": {"nominal": 180.0, "tol": "10 %"}, "tau_m": {"nominal": 0.03, "tol": "20 %"}}
CONTROLLER = "pid(kp=0.4, ki=4, kd=0.006, tf=0.0008)"


def cp_lower(k: int, n: int, conf: float) -> float:
    # Source: Clopper & Pearson (1934) via scipy.stats.beta.ppf (0 for k = 0)
    return 0.0 if k == 0 else float(beta.ppf(1.0 - conf, k, n - k + 1))


# -- the judgement at the edge (synthetic payloads: values +1 pass, -1 fail ">= 0") ----------
def _check(target=0.99, conf=0.95) -> Check:
    return Check(version_id=1, key="Y-1", version=1, status="draft", metric="phase_margin",
                 settings={}, comparator=">=", limit_value=0.0, limit_text=">= 0 deg",
                 unit="deg", yield_target=target, confidence=conf)


def _payload(samples: int, failing: int = 0, *, corner_fails=False, nominal_fails=False,
             fidelity_fails=False) -> dict:
    names = ["nominal", "corner:K-", "corner:K+"]
    vals = [-1.0 if nominal_fails else 1.0, -1.0 if corner_fails else 1.0, 1.0]
    names += [f"sample:{i + 1:04d}" for i in range(samples)]
    vals += [-1.0] * failing + [1.0] * (samples - failing)
    names.append("fidelity:full")
    vals.append(-1.0 if fidelity_fails else 1.0)
    return {"metric": "phase_margin", "variants": names, "values": vals, "errors": {},
            "unstable": False}


def test_reference_edges_of_99_at_95():
    # Source: scipy.stats.beta.ppf (see module docstring).  No failure: 299 samples are the
    # fewest that support 99 % at 95 % (0.05^(1/299) = 0.990031, 0.05^(1/298) = 0.989997);
    # one failure: 473 are the fewest (bound 0.990010; 472 give 0.989989); two: 628.
    assert cp_lower(299, 299, 0.95) >= 0.99 > cp_lower(298, 298, 0.95)
    assert cp_lower(472, 473, 0.95) >= 0.99 > cp_lower(471, 472, 0.95)
    assert cp_lower(626, 628, 0.95) >= 0.99 > cp_lower(625, 627, 0.95)
    # the point estimate 298/299 = 99.67 % exceeds the target, its bound does not
    assert 298 / 299 > 0.99 > cp_lower(298, 299, 0.95)


@pytest.mark.parametrize("samples, failing, verdict", [
    (299, 0, "pass"), (298, 0, "fail"),        # zero failures: 299 needed
    (473, 1, "pass"), (472, 1, "fail"),        # one failure: 473 needed
    (628, 2, "pass"), (627, 2, "fail"),        # two failures: 628 needed
    (299, 1, "fail"),                          # 99.67 % point estimate, bound 98.42 %
])
def test_yield_target_judged_on_the_bound_at_the_edge(samples, failing, verdict):
    expect = "pass" if cp_lower(samples - failing, samples, 0.95) >= 0.99 else "fail"
    assert expect == verdict  # the table above is the reference's own edge
    jd = judge_payload(_check(), _payload(samples, failing))
    assert jd.verdict == verdict, jd.reason
    assert (jd.samples, jd.sample_passes) == (samples, samples - failing)
    # without a target the rule is unchanged: every member must pass
    plain = judge_payload(_check(target=None, conf=None), _payload(samples, failing))
    assert plain.verdict == ("pass" if failing == 0 else "fail")
    assert plain.pass_fraction == pytest.approx((samples + 4 - failing) / (samples + 4),
                                                rel=1e-15)


def test_bound_text_never_rounds_across_the_target():
    from ledger.yieldbound import bound_percent

    # one failure in 472: bound 0.9899892 (scipy, above); one decimal would read 99.0 %
    b = cp_lower(471, 472, 0.95)
    assert bound_percent(b, 0.99) == "98.999 %"
    assert bound_percent(cp_lower(472, 473, 0.95), 0.99) == "99.0 %"
    jd = judge_payload(_check(), _payload(472, 1))
    assert "yield bound 98.999 % < 99 % at 95 %" in jd.reason


def test_yield_target_members_that_decide():
    # corners are the tolerance box's extremes: they do not decide under a yield target
    jd = judge_payload(_check(), _payload(299, corner_fails=True))
    assert jd.verdict == "pass" and jd.worst_variant == "corner:K-"
    # the nominal model and fidelity models are no random draws: they must pass
    for kw in ({"nominal_fails": True}, {"fidelity_fails": True}):
        jd = judge_payload(_check(), _payload(1000, **kw))
        assert jd.verdict == "fail" and "must pass" in jd.reason
    # no random samples: no claim can be supported
    jd = judge_payload(_check(), _payload(0))
    assert jd.verdict == "error" and "needs random samples" in jd.reason
    assert jd.samples is None
    # a lower confidence asks less of the same evidence: 230 of 230 support 99 % at 90 %
    # (Source: 0.10^(1/230) = 0.99004, closed form k = n) but not at 95 %
    assert judge_payload(_check(0.99, 0.90), _payload(230)).verdict == "pass"
    assert judge_payload(_check(0.99, 0.95), _payload(230)).verdict == "fail"


def test_unstable_samples_count_as_failing():
    p = _payload(473)
    p["values"][3] = float("-inf")  # sample:0001 unstable (worst-direction infinity)
    p["errors"] = {"sample:0001": "closed loop unstable"}
    p["unstable"] = True
    jd = judge_payload(_check(), p)
    assert (jd.samples, jd.sample_passes) == (473, 472)
    assert jd.verdict == "pass" and "unstable" in jd.reason  # 472 of 473: bound 0.990010
    assert judge_payload(_check(target=None, conf=None), p).verdict == "fail"


# -- in the ledger ------------------------------------------------------------------------
@pytest.fixture
def ylg(tmp_path):
    lg = open_ledger(tmp_path / "y.db", create=True, author="tester")
    lg.add_plant("pz", PLANT, params=PARAMS, samples=400, seed=7)
    lg.add_loop("pz", "pz", kind="position")
    # >= 55 deg: the nominal (61 deg) passes, a corner and a few samples fail
    for key, claim in (("PM-1", None), ("PM-2", "90 % at 95 %"), ("PM-3", "99.9 % at 95 %")):
        lg.add_requirement(key, title="Phase margin", statement="PM at least 55 deg.",
                           metric="phase_margin", limit=">= 55 deg", loops=["pz"],
                           yield_claim=claim)
    lg.add_revision("pz", CONTROLLER, rationale="first tuning")
    yield lg
    lg.close()


def _sample_counts_from_cache(path: Path, limit: float) -> tuple[int, int]:
    """Passing samples counted from the cached per-variant values (plain SQL and numpy)."""
    with sqlite3.connect(path) as db:
        rows = db.execute("SELECT values_json FROM metric_value").fetchall()
    assert len(rows) == 1  # the three requirements share one metric and settings
    p = json.loads(rows[0][0])
    vals = np.array([float(v) for v in p["values"]])
    s = np.array([n.startswith("sample:") for n in p["variants"]])
    return int(s.sum()), int((vals[s] >= limit).sum())


def test_ledger_judges_targets_on_the_bound(ylg, tmp_path):
    n, k = _sample_counts_from_cache(tmp_path / "y.db", 55.0)
    assert n == 400 and 0 < n - k < 40  # some samples fail, most pass
    res = {r.requirement: r for r in ylg.results("pz")}
    for r in res.values():
        assert (r.samples, r.sample_passes) == (n, k)
        # Source: scipy.stats.beta.ppf; tolerance: bisection to double precision
        assert r.yield_bound == pytest.approx(cp_lower(k, n, 0.95), rel=1e-9)
    assert res["PM-1"].verdict == "fail"  # no target: every variant must pass
    assert res["PM-2"].verdict == ("pass" if cp_lower(k, n, 0.95) >= 0.90 else "fail") == "pass"
    assert res["PM-3"].verdict == "fail" and "<" in res["PM-3"].reason
    # samples needed for the claim, all passing: ceil(ln 0.05 / ln 0.9) = 29 and
    # ceil(ln 0.05 / ln 0.999) = 2995 (Source: the zero-failure formula, arithmetic)
    assert (res["PM-2"].samples_needed, res["PM-3"].samples_needed) == (29, 2995)
    assert res["PM-1"].samples_needed is None
    # the worst value and variant stay the family's own (a corner)
    assert res["PM-2"].worst_variant.startswith("corner:")
    assert res["PM-2"].value == res["PM-1"].value


def test_target_is_part_of_the_version_and_reuses_cached_values(ylg):
    before = ylg.requirement("PM-1")
    cached = ylg.counts()["metric_value"]
    after = ylg.edit_requirement("PM-1", yield_claim="90 % at 95 %")
    assert after.version == before.version + 1 and after.content_hash != before.content_hash
    assert (after.yield_target, after.confidence) == (0.90, 0.95) and after.settings == {}
    assert ylg.counts()["metric_value"] == cached  # judged from the cache, nothing computed
    res = {r.requirement: r for r in ylg.results("pz")}
    assert res["PM-1"].verdict == "pass" and res["PM-1"].requirement_version == after.version
    # the confidence alone: keeps the target
    conf = ylg.edit_requirement("PM-1", confidence="90 %")
    assert (conf.yield_target, conf.confidence) == (0.90, 0.90)
    # removing the target gives back the first version's content hash and today's rule
    plain = ylg.edit_requirement("PM-1", yield_claim="none", confidence=None)
    assert plain.yield_target is None and plain.confidence is None
    assert plain.content_hash == before.content_hash
    assert {r.requirement: r for r in ylg.results("pz")}["PM-1"].verdict == "fail"


def test_requirement_without_target_keeps_its_hash(lg):
    # the content hash of a requirement version as the schema-0002 fixture writes it (no
    # yield keys: settings_json "{}"), so adding yield settings changed no existing hash
    from tests.fixtures.make_ledger_fixtures import req_hash

    lg.add_plant("pz", PLANT, params=PARAMS)
    lg.add_loop("pz", "pz")
    r = lg.add_requirement("PZ-1", title="T", statement="S.", metric="phase_margin",
                           limit=">= 45 deg", loops=["pz"])
    assert r.content_hash == req_hash("T", "S.", "", "analysis", "draft", "phase_margin", "{}",
                                      ">=", 45.0, ">= 45 deg", [], ["pz"])


@pytest.mark.parametrize("kw, match", [
    ({"yield_claim": "99 %"}, "must look like"),
    ({"yield_claim": "99 % at 100 %"}, "strictly between"),
    ({"confidence": "1.5"}, "must look like"),
    ({"yield_claim": "99 % at 95 %", "confidence": "90 %"}, "disagrees"),
    ({"settings": {"yield_target": 0.9}}, "set by the yield claim"),
])
def test_bad_yield_claims_are_refused_and_write_nothing(ylg, kw, match):
    counts = ylg.counts()
    with pytest.raises(LedgerError, match=match):
        ylg.edit_requirement("PM-1", **kw)
    with pytest.raises(LedgerError, match=match):
        ylg.add_requirement("PM-9", title="T", statement="S.", metric="phase_margin",
                            limit=">= 45 deg", loops=["pz"], **kw)
    assert ylg.counts() == counts


def test_yield_claim_needs_a_metric(ylg):
    counts = ylg.counts()
    with pytest.raises(LedgerError, match="needs a metric"):
        ylg.add_requirement("SYS-9", title="T", statement="S.", yield_claim="99 % at 95 %")
    assert ylg.counts() == counts


def test_spec_round_trip_keeps_the_target(ylg, tmp_path):
    from ledger.spec import export_spec, import_spec

    ylg.edit_requirement("PM-1", confidence="90 %")
    path = export_spec(ylg, tmp_path / "spec.toml")
    text = path.read_text(encoding="utf-8")
    assert 'yield = "90 % at 95 %"' in text and 'yield = "99.9 % at 95 %"' in text
    assert 'confidence = "90 %"' in text
    other = open_ledger(tmp_path / "other.db", create=True, author="tester")
    try:
        import_spec(other, path)
        for key in ("PM-1", "PM-2", "PM-3"):
            a, b = ylg.requirement(key), other.requirement(key)
            assert (a.yield_target, a.confidence, a.content_hash) == (
                b.yield_target, b.confidence, b.content_hash)
        # importing the same file again changes nothing
        rep = import_spec(other, path)
        assert not rep.new_versions
    finally:
        other.close()


def test_exports_carry_the_bound_and_validate(ylg, tmp_path):
    jsonschema = pytest.importorskip("jsonschema")
    from ledger.exports import export_matrix, json_schema_path
    from ledger.history.matrix import build_matrix

    m = build_matrix(ylg, "all")
    doc = json.loads(export_matrix(m, tmp_path / "m.json").read_text(encoding="utf-8"))
    schema = json.loads(json_schema_path().read_text(encoding="utf-8"))
    errors = list(jsonschema.Draft202012Validator(schema).iter_errors(doc))
    assert not errors, [e.message for e in errors[:3]]
    rows = {r["requirement"]: r for r in doc["rows"]}
    n, k = rows["PM-1"]["samples"], rows["PM-1"]["sample_passes"]
    assert n == 400 and rows["PM-2"]["yield_target"] == 0.9
    assert rows["PM-2"]["yield_bound"] == pytest.approx(cp_lower(k, n, 0.95), rel=1e-9)
    assert rows["PM-3"]["samples_needed"] == 2995 and rows["PM-1"]["samples_needed"] is None
    assert rows["PM-1"]["yield_shown"].endswith("% at 95 %")
    bad = json.loads(json.dumps(doc))
    bad["rows"][0]["yield_bound"] = 1.5  # outside 0..1: the schema refuses it
    assert list(jsonschema.Draft202012Validator(schema).iter_errors(bad))
    csv_text = export_matrix(m, tmp_path / "m.csv").read_text(encoding="utf-8")
    header = csv_text.splitlines()[1].split(",")
    assert {"yield_bound", "yield_confidence", "samples", "sample_passes"} <= set(header)
    html = export_matrix(m, tmp_path / "m.html", ledger=ylg).read_text(encoding="utf-8")
    assert "Yield bound" in html and "Clopper-Pearson" in html
    assert "replace hardware testing" in html


def test_corner_only_family_gets_no_bound(tmp_path):
    lg = open_ledger(tmp_path / "c.db", create=True, author="tester")
    try:
        lg.add_plant("pz", PLANT, params=PARAMS)  # corners, no samples
        lg.add_loop("pz", "pz")
        lg.add_requirement("PM-1", title="T", statement="S.", metric="phase_margin",
                           limit=">= 45 deg", loops=["pz"])
        lg.add_requirement("PM-2", title="T", statement="S.", metric="phase_margin",
                           limit=">= 45 deg", loops=["pz"], yield_claim="99 % at 95 %")
        lg.add_revision("pz", CONTROLLER, rationale="first")
        res = {r.requirement: r for r in lg.results("pz")}
        assert res["PM-1"].verdict == "pass" and res["PM-1"].yield_bound is None
        assert res["PM-1"].samples is None
        assert res["PM-2"].verdict == "error" and "random samples" in res["PM-2"].reason
        from ledger.yieldbound import bound_text

        assert bound_text(res["PM-1"]) == "no samples"
    finally:
        lg.close()


# -- the command line ---------------------------------------------------------------------
def test_cli_yield_options_and_results_column(tmp_path, monkeypatch):
    from typer.testing import CliRunner

    from ledger.cli import app

    monkeypatch.setenv("LOOPLEDGER_DB", str(tmp_path / "cli.db"))
    monkeypatch.setenv("LOOPLEDGER_AUTHOR", "tester")
    monkeypatch.setenv("COLUMNS", "240")
    runner = CliRunner()

    def call(*args, code=0):
        res = runner.invoke(app, list(args))
        assert res.exit_code == code, (args, res.output)
        return res.output

    call("init")
    call("plant", "add", "pz", PLANT, "--param", "K=180:10%", "--param", "tau_m=0.03:20%",
         "--samples", "300", "--seed", "3")
    call("loop", "add", "pz", "--plant", "pz")
    call("requirement", "add", "PM-1", "--title", "PM", "--statement", "PM >= 45 deg.",
         "--metric", "phase_margin", "--limit", ">= 45 deg", "--loop", "pz",
         "--yield", "yield >= 99 % at 95 %")
    call("revision", "add", "pz", CONTROLLER, "--why", "first")
    out = call("results", "pz")
    # 300 of 300 pass: bound 0.05^(1/300) = 0.99006 (closed form, k = n)
    assert "yield bound" in out and "99.0 % at 95 %" in out
    assert "yield bound 99.0 % >= 99 % at 95 %" in out  # the note, cut to its column
    shown = call("requirement", "show", "PM-1")
    assert ">= 99 % at 95 %" in shown and "299 passing samples" in shown
    rows = json.loads(call("results", "pz", "--json"))
    assert rows[0]["samples"] == 300 and rows[0]["samples_needed"] == 299
    assert rows[0]["yield_bound"] == pytest.approx(0.05 ** (1 / 300), rel=1e-12)
    assert "(300 of 300 samples pass)" in rows[0]["reason"]
    # a bad claim: one line, exit 1, no new version
    out = call("requirement", "edit", "PM-1", "--yield", "most of them", code=1)
    assert out.startswith("error: ") and len(out.strip().splitlines()) == 1
    assert json.loads(call("requirement", "show", "PM-1", "--json"))["version"] == 1
    call("requirement", "edit", "PM-1", "--yield", "none")
    assert json.loads(call("requirement", "show", "PM-1", "--json"))["yield_target"] is None


# -- the UI -------------------------------------------------------------------------------
async def test_ui_requirement_view_shows_target_and_bound(ylg):
    from textual.widgets import Static

    from ledger.tui.app import LedgerApp
    from tests.test_tui import press, settle

    app = LedgerApp(ledger=ylg)
    app.current_req = "PM-2"
    async with app.run_test(size=(160, 40)) as pilot:
        await settle(pilot)
        await press(pilot, "3")
        text = str(app.screen.query_one("#req-detail", Static).render())
        assert "yield target: >= 90 % at 95 %" in text
        assert "29 passing samples" in text  # ceil(ln 0.05 / ln 0.9) = 29 (arithmetic)
        assert "yield bound" in text and "% at 95 %" in text


# -- verdicts without a target are unchanged (the demo ledger) ---------------------------
def test_demo_verdicts_unchanged_when_rejudged(tmp_path):
    """Every fresh result of the committed demo ledger (written by the judge before yield
    targets existed) is judged again from its cached values: same verdict, value, worst
    variant and pass fraction.  The demo's requirements state no yield target."""
    from ledger.audit import audit
    from ledger.store import loops as loops_db
    from ledger.store import results as results_db
    from ledger.store import revisions as rev_db
    from ledger.verification.plan import plan_revision

    path = tmp_path / "demo.db"
    shutil.copy(ROOT / "sample_db" / "demo.db", path)
    lg = open_ledger(path)
    try:
        assert audit(lg).ok
        assert all(r.yield_target is None for r in lg.requirements())
        compared = 0
        with lg.reading() as s:
            for info in lg.loops():
                lp = loops_db.loop_row(s, info.name)
                stored = results_db.for_revisions(s, lp, rev_db.revision_rows(s, lp), False)
                for rev in rev_db.revision_rows(s, lp):
                    plan = plan_revision(s, lp, revision=rev, missing_only=False)
                    cached = results_db.load_cached(s, set(plan.keys()))
                    mine = {r.requirement: r for r in stored[rev.label]}
                    for c in plan.checks:
                        k = plan.metric_key(c.metric, c.settings)
                        if c.key not in mine or k not in cached:
                            continue
                        jd, old = judge_payload(c, cached[k]), mine[c.key]
                        assert (jd.verdict, jd.worst_variant) == (old.verdict,
                                                                   old.worst_variant), c.key
                        assert jd.pass_fraction == old.pass_fraction
                        if old.value is not None and np.isfinite(old.value):
                            assert jd.value == old.value
                        compared += 1
        assert compared > 50
    finally:
        lg.close()


async def test_ui_matrix_detail_line_shows_the_bound(ylg):
    from textual.widgets import DataTable

    from ledger.tui.app import LedgerApp
    from tests.test_tui import press, settle

    app = LedgerApp(ledger=ylg)
    async with app.run_test(size=(160, 40)) as pilot:
        await settle(pilot)
        await press(pilot, "2")
        scr = app.screen
        table = scr.query_one(DataTable)
        keys = [r.key for r in scr.visible_rows()]
        table.move_cursor(row=keys.index("PM-2"), column=1)
        await pilot.pause()
        detail = str(scr.query_one("#matrix-detail").render())
        assert "PM-2 on pz/r1" in detail and "pass" in detail
        assert "yield bound" in detail and "target 90 % at 95 % (needs 29 passing)" in detail
