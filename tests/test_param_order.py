"""Parameter order: corner names list the parameters in the order given (docs/models.md), through
record, store, reload, CLI and exports, while a plant's content hash stays canonical (sorted),
so hashes of ledgers written before the order was kept do not change.

Plant K/(s (tau s + 1)) with the parameters given as tau, then K: sorted order would be K, tau.
"""

from __future__ import annotations

import csv
import json
import shutil
from pathlib import Path

from typer.testing import CliRunner

from ledger.api import open_ledger, plant_content_hash
from ledger.cli import app
from ledger.exports import export_matrix
from ledger.hashing import sha256_of
from ledger.history.matrix import build_matrix
from ledger.systems import build_family

SAMPLE = Path(__file__).parents[1] / "sample_db" / "demo.db"
MODEL = "K/(s*(tau*s+1))"
GIVEN = {"tau": {"nominal": 0.03, "tol": "20 %"}, "K": {"nominal": 180.0, "tol": "10 %"}}
SORTED = dict(sorted(GIVEN.items()))
#: every corner of GIVEN, named in the given order (itertools.product order of "-+")
CORNERS = ["corner:tau-,K-", "corner:tau-,K+", "corner:tau+,K-", "corner:tau+,K+"]


def _build(lg):
    lg.add_plant("pz", MODEL, params=GIVEN, samples=3, seed=5)
    lg.add_loop("pz", "pz")
    lg.add_requirement("PZ-1", title="Phase margin", statement="PM at least 45 deg.",
                       metric="phase_margin", limit=">= 45 deg", loops=["pz"])
    lg.add_revision("pz", "pid(kp=0.4, ki=4, kd=0.006, tf=0.0008)", rationale="first tuning")


def test_family_names_corners_in_the_order_given_and_samples_do_not_depend_on_it():
    a = build_family(MODEL, GIVEN, samples=4, seed=9)
    b = build_family(MODEL, SORTED, samples=4, seed=9)
    assert [n for n in a.names if n.startswith("corner:")] == CORNERS
    assert [n for n in b.names if n.startswith("corner:")][0] == "corner:K-,tau-"
    # the same parameters give the same samples whatever order they are listed in (drawn in
    # sorted name order), so a content hash that ignores the order is a sound cache key
    sa = {v.name: v.params for v in a.variants if v.kind == "sample"}
    sb = {v.name: v.params for v in b.variants if v.kind == "sample"}
    assert sa == sb and len(sa) == 4


def test_order_kept_through_record_store_reload_cli_and_export(db_url, tmp_path, monkeypatch):
    with open_ledger(db_url, create=True, author="tester") as lg:
        _build(lg)
        assert list(lg.plant("pz").params) == ["tau", "K"]              # record
        worst = {r.worst_variant for r in lg.results("pz")}
    with open_ledger(db_url, author="tester") as lg:                     # store, reload
        p = lg.plant("pz")
        assert list(p.params) == ["tau", "K"]
        # the family verification builds from the stored plant names corners in that order
        fam = build_family(p.model, p.params, samples=p.samples, seed=p.seed)
        assert [n for n in fam.names if n.startswith("corner:")] == CORNERS
        assert worst and all(w == "nominal" or w.startswith("sample:") or w in CORNERS
                             for w in worst), worst
        m = build_matrix(lg, "all")
        out = export_matrix(m, tmp_path / "m.csv")                       # export
        rows = list(csv.DictReader(out.read_text().splitlines()[1:]))  # after the preamble
        col = next(k for k in rows[0] if "variant" in k.lower())
        assert {r[col] for r in rows} == worst
        from ledger.spec import dump_spec

        assert list(dump_spec(lg)["plant"][0]["params"]) == ["tau", "K"]
    monkeypatch.setenv("LOOPLEDGER_DB", db_url)                          # CLI
    res = CliRunner().invoke(app, ["plant", "show", "pz"])
    assert res.exit_code == 0, res.output
    lines = [l.split()[1] for l in res.output.splitlines() if l.strip().startswith("param")]
    assert lines == ["tau", "K"]
    res = CliRunner().invoke(app, ["plant", "show", "pz", "--json"])
    assert list(json.loads(res.output)["params"]) == ["tau", "K"]


def test_content_hash_is_canonical(db_url, tmp_path):
    """The hash is the one the sorted form always had: the same plant given in either order has
    one hash, and giving it again in the other order is no new version."""
    with open_ledger(db_url, create=True, author="tester") as lg:
        p = lg.add_plant("pz", MODEL, params=GIVEN)
        fields = {"canonical": p.canonical, "samples": 0, "seed": 0, "sample_time": None,
                  "input_unit": "", "output_unit": "",
                  "fidelity_json": json.dumps({}, sort_keys=True)}
        # Source: the plant hash formula as written before the order was kept (parameters as
        # json.dumps(..., sort_keys=True)), evaluated independently here
        old = sha256_of({**fields, "parameters_json": json.dumps(SORTED, sort_keys=True)})
        assert p.content_hash == old
        again = lg.add_plant("pz", MODEL, params=SORTED)
        assert again.version == 1 and again.content_hash == old
    with open_ledger(tmp_path / "other.db", create=True) as other:
        assert other.add_plant("pz", MODEL, params=SORTED).content_hash == old


def test_hashes_of_existing_ledgers_unchanged(tmp_path):
    """Every plant version of the sample ledger (written by the code before the order was kept,
    parameters stored sorted) still has the hash the ledger stored for it."""
    from sqlalchemy import create_engine, text

    path = tmp_path / "demo.db"
    shutil.copy(SAMPLE, path)
    eng = create_engine(f"sqlite:///{path}")
    seen = 0
    with eng.connect() as c:
        for pv in c.execute(text("SELECT * FROM plant_version")).mappings():
            params = list(json.loads(pv["parameters_json"]))
            assert plant_content_hash(pv) == pv["content_hash"], pv["id"]
            seen += 1
    eng.dispose()
    assert seen >= 3
