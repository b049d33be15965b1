"""Digital revisions in the ledger (issue 14): the method and number format recorded with the
design, the discrete controller verified stored and hashed beside it, through the API, the
CLI and spec files.

References: scipy.signal.cont2discrete (bilinear) for the stored discrete controller;
python-control ``margin`` for the verified phase margin; the rest checks the ledger's own
rules (recorded, hashed, refused, round-tripped; common practice, no source).
"""

from __future__ import annotations

import math
import re

import control
import numpy as np
import pytest
import scipy.signal
from typer.testing import CliRunner

from ledger.cli import app
from ledger.errors import LedgerError
from ledger.systems import parse_model

TS = 0.001
PLANT = "40/(s*(0.05*s+1))"
LEAD = "lead(0.3, 2*pi*2, 2*pi*30)"


def _setup(lg):
    lg.add_plant("gimbal", PLANT)
    lg.add_loop("ax", "gimbal", sample_time=TS, computation_delay=1)
    lg.add_requirement("AX-PM", title="PM", statement="PM >= 45 deg.", metric="phase_margin",
                       limit=">= 45 deg", loops=["ax"])


def test_continuous_design_is_recorded_with_its_method_and_verified_discrete(lg):
    _setup(lg)
    before = lg.counts()
    with pytest.raises(LedgerError, match="discretisation method"):
        lg.add_revision("ax", LEAD, rationale="first")
    assert lg.counts() == before                       # refused: nothing written
    r = lg.add_revision("ax", LEAD, rationale="first", discretization="tustin")
    assert r.controller == LEAD and r.discretization == "tustin"
    # Source: scipy.signal.cont2discrete(method='bilinear') of the same lead
    K = parse_model(LEAD).system
    nd, dd, _ = scipy.signal.cont2discrete((K.num[0][0], K.den[0][0]), TS, method="bilinear")
    Kv = parse_model(r.verified, sample_time=TS).system
    np.testing.assert_allclose(Kv.num[0][0], nd.reshape(-1) / dd[0], rtol=1e-10)
    np.testing.assert_allclose(Kv.den[0][0], dd / dd[0], rtol=1e-10)
    # the verdict is on the discrete loop with one sample of computation delay.
    # Source: python-control margin() of Kd z^-1 G_zoh
    G = control.sample_system(parse_model(PLANT).system, TS, method="zoh")
    _, pm, _, _ = control.margin(Kv * G * control.tf([1], [1, 0], TS))
    (res,) = lg.results("ax", r.label)
    assert res.value == pytest.approx(pm, rel=1e-5)
    # another method is another revision content: another hash
    r2 = lg.add_revision("ax", LEAD, rationale="first", discretization="zoh", parent=None)
    assert r2.content_hash != r.content_hash and r2.verified != r.verified
    # the audit recomputes both hashes with the digital fields and finds nothing altered
    from ledger.audit import audit

    rep = audit(lg)
    assert rep.ok, rep.findings


def test_digital_settings_on_a_continuous_loop_are_refused(lg):
    lg.add_plant("p", PLANT)
    lg.add_loop("c", "p")
    before = lg.counts()
    for kw in ({"discretization": "tustin"}, {"number_format": "fixed:16/12"}):
        with pytest.raises(LedgerError, match="needs a digital loop"):
            lg.add_revision("c", LEAD, rationale="x", **kw)
    assert lg.counts() == before


def test_firmware_forms_quantised_as_entered(lg):
    _setup(lg)
    sos = "sos([[0.1, 0.2, 0.1, -1.6, 0.7]], 0.5)"
    r = lg.add_revision("ax", sos, rationale="biquad", number_format="fixed:16/12")
    # every coefficient rounded to a multiple of 2^-12, the form kept
    m = re.fullmatch(r"sos\(\[\[(.*)\]\], (.*)\)", r.verified)
    values = [float(x) for x in m.group(1).split(",")] + [float(m.group(2))]
    assert all(v * 4096 == round(v * 4096) for v in values)
    assert values == [round(x * 4096) / 4096 for x in (0.1, 0.2, 0.1, -1.6, 0.7, 0.5)]
    r2 = lg.add_revision("ax", sos, rationale="biquad")          # no format: as written
    assert r2.verified == "" and r2.content_hash != r.content_hash


def test_old_revisions_keep_their_hash_rule(lg):
    # a revision without digital fields hashes exactly as before the fields existed
    from ledger.hashing import sha256_of

    lg.add_plant("p", PLANT)
    lg.add_loop("c", "p")
    r = lg.add_revision("c", "pid(kp=1, ki=2)", rationale="x", verify=False)
    expected = sha256_of({"loop": "c", "label": r.label, "controller": "pid(kp=1.0,ki=2.0)",
                          "parent": None, "rationale": "x", "author": r.author,
                          "created_at": r.created_at.isoformat()})
    assert r.content_hash == expected


def test_spec_round_trip_of_digital_revisions(lg, tmp_path):
    from ledger.api import open_ledger
    from ledger.spec import export_spec, import_spec

    _setup(lg)
    lg.add_revision("ax", LEAD, rationale="design", discretization="tustin@30Hz", verify=False)
    lg.add_revision("ax", "diffeq([4.1, -4.0], [-0.82])", rationale="firmware",
                    number_format="single", verify=False)
    path = export_spec(lg, tmp_path / "s.toml")
    text = path.read_text()
    assert 'discretize = "tustin@188.49555921538757"' in text
    assert 'number_format = "single"' in text
    other = open_ledger(tmp_path / "o.db", create=True, author=lg.author)
    try:
        import_spec(other, path)
        a = {(r.label, r.controller, r.discretization, r.number_format, r.verified)
             for r in lg.revisions("ax")}
        b = {(r.label, r.controller, r.discretization, r.number_format, r.verified)
             for r in other.revisions("ax")}
        assert a == b
        # importing again changes nothing
        rep = import_spec(other, path)
        assert not rep.revisions_added
    finally:
        other.close()


@pytest.fixture
def cli(db_url, monkeypatch):
    monkeypatch.setenv("LOOPLEDGER_DB", db_url)
    monkeypatch.setenv("LOOPLEDGER_AUTHOR", "tester")
    monkeypatch.setenv("COLUMNS", "200")
    runner = CliRunner()

    def call(*args, code=0):
        res = runner.invoke(app, list(args))
        assert res.exit_code == code, (args, res.output)
        return res.output

    call("init")
    return call


def test_cli_revision_add_and_show_digital(cli):
    cli("plant", "add", "g", PLANT)
    cli("loop", "add", "ax", "--plant", "g", "--sample-time", "0.001")
    out = cli("revision", "add", "ax", LEAD, "--why", "w", code=1)
    assert "--discretize" in out and out.count("\n") == 1
    cli("revision", "add", "ax", LEAD, "--why", "w", "--discretize", "tustin@nonsense", code=1)
    out = cli("revision", "add", "ax", LEAD, "--why", "w", "--discretize", "matched",
              "--number-format", "fixed:24/16")
    assert "verified as diffeq(" in out
    shown = cli("revision", "show", "ax")
    assert "matched pole-zero" in shown and "fixed:24/16" in shown
    assert "verified    diffeq(" in shown
    # the continuous equivalent of the quantised controller: close to the design's
    # 4.5 (s + 12.566) / (s + 188.5) = (4.5 s + 56.55)/(s + 188.5)
    m = re.search(r"in s\s+\((\S+)\*s \+ (\S+)\)/\(1\*s \+ (\S+)\)", shown)
    assert m, shown
    k, z, p = (float(x) for x in m.groups())
    assert k == pytest.approx(4.5, rel=1e-3) and z == pytest.approx(4.5 * 2 * math.pi * 2,
                                                                      rel=1e-3)
    assert p == pytest.approx(2 * math.pi * 30, rel=1e-3)


def test_digital_loops_get_the_quantisation_starter(lg):
    lg.add_plant("g", PLANT)
    lg.add_loop("ax", "g", sample_time=TS)
    lg.add_loop("c", "g")
    keys = {r.key: r for r in lg.add_starter_requirements("ax")}
    assert keys["AX-D01"].metric == "quantization_pole_shift"
    assert not any(k.endswith("-D01") for k in (r.key for r in lg.add_starter_requirements("c")))
    r = lg.add_revision("ax", "diffeq([0.3, -0.29], [-0.95])", rationale="q",
                        number_format="fixed:12/8")
    got = {x.requirement: x for x in lg.results("ax", r.label)}
    # 0.3 -> 77/256, -0.29 -> -74/256, -0.95 -> -243/256 (stored as quantised text) ...
    assert r.verified == "diffeq([0.30078125, -0.2890625], [-0.94921875])"
    # ... and the ledger's value is the engine's on the same coefficients (the closed-loop
    # pole shift itself is checked against python-control in test_digital.py)
    from ledger.engine import measure

    ref = measure(PLANT, "diffeq([0.3, -0.29], [-0.95])", ["quantization_pole_shift"],
                  sample_time=TS, number_format="fixed:12/8")["quantization_pole_shift"]
    assert ref > 0.002 / 10
    assert got["AX-D01"].value == pytest.approx(ref, rel=1e-9)
    assert got["AX-D01"].verdict == ("pass" if ref <= 0.002 else "fail")
