"""Measured plants (issue 15): reading files, frequency metrics on data, Nyquist on data,
recording in a ledger.

References are outside the project: the exact model values come from the ledger's model path,
which is itself checked against python-control in tests/test_margins.py and friends, and here
again directly against python-control ``stability_margins`` and closed-loop poles
(``control.feedback`` + ``control.poles``)."""

import math
from pathlib import Path

import control
import numpy as np
import pytest

from ledger.api import open_ledger
from ledger.engine import measure
from ledger.errors import LedgerError, ModelError
from ledger.systems.measfile import parse_measurement
from ledger.systems.measured import from_frd, measured_response
from ledger.systems.variants import PlantFamily, Variant

G = control.tf([10.0], [1, 11, 10, 0])          # 10/(s(s+1)(s+10)), one integrator
C = control.tf([2.0, 1.0], [0.05, 1.0])         # lead, proper
FREQ = ["gain_margin", "phase_margin", "delay_margin", "gain_crossover", "phase_crossover",
        "peak_sensitivity", "disk_margin", "bandwidth"]


def _measured(sys, n, lo=-3, hi=3, **kw):
    w = np.logspace(lo, hi, n)
    return measured_response(w, sys(1j * w), **kw)


def _fam(*ms):
    return PlantFamily(tuple(Variant(f"measured:u{i}", "measured", m) for i, m in enumerate(ms)))


def test_metrics_on_sampled_model_converge_at_second_order():
    # source: python-control stability_margins / model path (exact for the model); the
    # interpolant is linear in log w for log|G| and phase, so its error is O(h^2) in the
    # log-frequency step h: 4x the points -> about 16x smaller error (at least 8x asserted; a node that happens
    # to fall on a crossing makes one coarse error small by luck, so 200 -> 800 is shown).
    ref = measure(G, C, FREQ)
    gm, pm, _, wpc, wgc, _ = control.stability_margins(G * C)
    assert ref["gain_margin"] == pytest.approx(20 * math.log10(gm), rel=1e-9)
    assert ref["phase_margin"] == pytest.approx(pm, rel=1e-9)
    errs = []
    for n in (200, 800):
        r = measure(_fam(_measured(G, n, integrators=1)), C, FREQ)
        errs.append(np.array([abs(r[k] - ref[k]) / abs(ref[k]) for k in FREQ]))
    assert np.all(errs[1] < 5e-4)
    ratio = errs[0] / errs[1]
    assert np.all(ratio > 8), ratio


def test_frequency_response_data_second_reference():
    # source: python-control FrequencyResponseData + stability_margins on the same points.
    # python-control interpolates the FRD on its own grid (its points here), so it agrees
    # only to the grid resolution; ours refines on the log interpolant and is closer to the
    # exact model value.
    w = np.logspace(-2, 2, 300)
    frd = control.frd(G * C, w)
    gm_c, pm_c, _, _, wgc_c, _ = control.stability_margins(frd)
    m = from_frd(control.frd(G, w), integrators=1)
    r = measure(_fam(m), C, ["gain_margin", "phase_margin", "gain_crossover"])
    gm_x, pm_x, _, _, wgc_x, _ = control.stability_margins(G * C)
    assert r["phase_margin"] == pytest.approx(pm_c, rel=2e-2)
    assert r["gain_margin"] == pytest.approx(20 * math.log10(gm_c), rel=2e-2)
    assert abs(r["phase_margin"] - pm_x) <= abs(pm_c - pm_x) + 1e-3


@pytest.mark.parametrize("k", [0.5, 2.0, 30.0, 200.0])
def test_nyquist_on_data_matches_closed_loop_poles(k):
    # source: closed-loop poles from control.feedback + control.poles of the model sampled
    z = np.sum(np.real(control.poles(control.feedback(k * G * C, 1))) > 0)
    r = measure(_fam(_measured(G, 600, lo=-4, hi=4, integrators=1)), k * C, ["stable"])
    assert r["stable"] == float(z == 0)


@pytest.mark.parametrize("k", [0.5, 3.0, 20.0])
def test_nyquist_open_loop_unstable_plant(k):
    # source: control.poles of the closed loop; plant 1/((s-1)(s/20+1)) has one RHP pole,
    # declared on the measurement; P controller k: stable exactly for k > 1
    P = control.tf([1.0], [1 / 20, 1 - 1 / 20, -1])
    z = np.sum(np.real(control.poles(control.feedback(k * P, 1))) > 0)
    m = _measured(P, 600, lo=-3, hi=4, rhp_poles=1)
    r = measure(_fam(m), k, ["stable"])
    assert r["stable"] == float(z == 0)
    undeclared = measure(_fam(_measured(P, 600, lo=-3, hi=4)), k, ["stable"])
    if z == 0:  # without the declaration the count is wrong: the data cannot show the pole
        assert undeclared["stable"] == 0.0


def test_outside_band_and_needs_model_are_errors():
    # common practice, no source: a peak at the edge of the data is not a value
    m = _measured(G, 200, lo=-1, hi=0.5, integrators=1)   # crossovers beyond the data
    r = measure(_fam(m), C, ["gain_margin", "settling_time"])
    with pytest.raises(LedgerError, match="outside measured band"):
        r["gain_margin"]
    with pytest.raises(LedgerError, match="needs a model"):
        r["settling_time"]


def test_low_coherence_points_are_excluded_and_counted():
    w = np.logspace(-2, 2, 50)
    g = G(1j * w)
    coh = np.full(50, 0.99)
    coh[20:23] = 0.3
    g = g.copy()
    g[20:23] *= 5.0  # corrupt the excluded points: they must not reach any metric
    m = measured_response(w, g, coherence=coh, integrators=1)
    assert m.excluded == 3
    ref = measure(_fam(measured_response(np.delete(w, [20, 21, 22]),
                                         np.delete(G(1j * w), [20, 21, 22]), integrators=1)),
                  C, ["phase_margin"])
    assert measure(_fam(m), C, ["phase_margin"])["phase_margin"] == ref["phase_margin"]


def test_mixed_family_worst_case_includes_measured_member():
    from ledger.systems import build_family

    fam = build_family("10/(s*(s+1)*(s+10))", {})
    m = _measured(control.tf([14.0], [1, 11, 10, 0]), 400, integrators=1)  # more gain
    mixed = PlantFamily(fam.variants + (Variant("measured:u1", "measured", m),))
    r = measure(mixed, C, ["phase_margin", "settling_time"])
    assert r.worst_variant("phase_margin") == "measured:u1"
    assert "measured:u1" in r.variant_errors("settling_time")


GOOD = "# bench\nfreq[Hz], mag[dB], phase[deg], coh\n1, -20, -95, 0.99\n2, -32, -100, 1\n"


@pytest.mark.parametrize("text, needle", [
    ("freq[Hz], mag[dB], phase[deg]\n2, -20, -95\n1, -30, -99\n", "line 3: frequency 1 is below"),
    ("freq[Hz], mag[dB], phase[deg]\n1, -20, -95\n1, -30, -99\n", "line 3: frequency 1 repeats"),
    ("freq[Hz], mag[dB], phase[deg]\n1, nan, -95\n2, -30, -99\n", "line 2: mag is 'nan'"),
    ("freq[Hz], mag[dB]\n1, -20\n2, -30\n", "column 'phase' is missing"),
    ("freq[kHz], mag[dB], phase[deg]\n1, -20, -95\n2, -30, -99\n", "freq[Hz] or freq[rad/s]"),
    ("freq, mag[dB], phase[deg]\n1, -20, -95\n2, -30, -99\n", "has no unit"),
    ("freq[Hz], mag[dB], phase[deg]\n1, -20, -95\n", "1 data point"),
    ("freq[Hz], mag[abs], phase[deg]\n1, 0, -95\n2, 0.1, -99\n", "line 2: linear magnitude"),
    ("freq[Hz], mag[dB], phase[deg]\n1, -20\n2, -30, -99\n", "line 2: 2 fields"),
    ("freq[Hz] re im coh\n1 0.1 0.2 1.5\n2 0.1 0.1 1\n", "line 2: coherence 1.5"),
])
def test_malformed_files_one_line_errors(text, needle):
    # common practice, no source: each malformed file gives one line naming the line
    with pytest.raises(ModelError) as e:
        parse_measurement(text, where="bench.csv")
    msg = str(e.value)
    assert "\n" not in msg and needle in msg and msg.startswith("bench.csv: ")


def test_file_units_convert():
    # closed form: 1 Hz = 2 pi rad/s; -20 dB = 0.1; -90 deg = -pi/2 rad
    m = parse_measurement("freq[Hz] mag[dB] phase[deg]\n1 -20 -90\n2 -20 -90\n")
    assert m.omega[0] == pytest.approx(2 * math.pi)
    assert m.response[0] == pytest.approx(-0.1j)
    m2 = parse_measurement(GOOD.replace("mag[dB]", "re").replace("phase[deg]", "im"))
    assert m2.response[0] == -20 - 95j


def test_ledger_records_measurement_and_verifies_it(tmp_path):
    from ledger.api import open_ledger

    lg = open_ledger(tmp_path / "l.db", create=True, author="t")
    lg.add_plant("p", "10/(s*(s+1)*(s+10))")
    m = _measured(control.tf([14.0], [1, 11, 10, 0]), 300, integrators=1,
                  measured_by="ann", excitation="0.1 A")
    v2 = lg.add_measurement("p", "unit-1", m)
    assert v2.version == 2 and "unit-1" in v2.measured
    with pytest.raises(LedgerError, match="already has a measurement"):
        lg.add_measurement("p", "unit-1", m)
    assert lg.plant("p").version == 2
    lg.add_loop("L", "p")
    lg.add_requirement("R-1", title="pm", statement="pm", metric="phase_margin",
                       limit=">= 45 deg", loops=["L"], status="approved")
    lg.add_revision("L", "(2*s+1)/(0.05*s+1)", rationale="first")
    res = lg.results("L")
    assert res[0].worst_variant == "measured:unit-1" and res[0].variants == 2


def test_model_fit_against_closed_form():
    # closed form: a measurement equal to the model times 1.12 e^{-j 0.2} deviates by
    # 20 log10 1.12 dB and 0.2 rad at every point
    from ledger.systems import build_family

    fam = build_family("10/(s*(s+1)*(s+10))", {})
    w = np.logspace(-1, 2, 40)
    m = measured_response(w, G(1j * w) * 1.12 * np.exp(-0.2j))
    mixed = PlantFamily(fam.variants + (Variant("measured:u1", "measured", m),))
    r = measure(mixed, C, ["model_fit", "model_fit_phase"], frequency=50.0)
    assert r["model_fit"] == pytest.approx(20 * math.log10(1.12), rel=1e-12)
    assert r["model_fit_phase"] == pytest.approx(math.degrees(0.2), rel=1e-12)
    assert r.worst_variant("model_fit") == "measured:u1"
    with pytest.raises(LedgerError, match="needs a measured member"):
        measure(fam, C, ["model_fit"], frequency=50.0)["model_fit"]


def test_spec_file_measurement_relative_path_and_hash(tmp_path):
    # common practice, no source: same file -> same version; changed file -> new version;
    # a malformed file -> one-line error naming it, nothing written
    from ledger.api import open_ledger
    from ledger.spec import import_spec

    (tmp_path / "bench").mkdir()
    data = tmp_path / "bench" / "u1.csv"
    data.write_text(GOOD)
    spec = tmp_path / "s.toml"
    spec.write_text('format = 1\n[[plant]]\nname = "p"\nmodel = "1/(s*(s+1))"\n'
                    '[plant.measured.u1]\nfile = "bench/u1.csv"\nintegrators = 1\n'
                    'measured_by = "ann"\n')
    lg = open_ledger(tmp_path / "l.db", create=True, author="t")
    import_spec(lg, spec)
    p = lg.plant("p")
    assert p.measured["u1"]["meta"]["source"] == "bench/u1.csv" and p.version == 1
    import_spec(lg, spec)
    assert lg.plant("p").version == 1
    data.write_text(GOOD.replace("-32", "-33"))
    import_spec(lg, spec)
    assert lg.plant("p").version == 2
    data.write_text(GOOD.replace("2, -32", "1, -32"))
    with pytest.raises(LedgerError) as e:
        import_spec(lg, spec)
    assert "line 4: frequency 1 repeats" in str(e.value) and "\n" not in str(e.value)
    assert lg.plant("p").version == 2


def test_demo_bench_gain_margin_fails_only_on_measured_units(tmp_path):
    # Source: the demo's own story (sample_db/README.md, the gantry-x-bench part of
    # sample_db/demo.toml); the margins on measured data are checked against python-control
    # above.
    import sys
    from pathlib import Path

    from ledger.api import open_ledger
    from ledger.engine import measure_family

    here = Path(__file__).resolve().parents[1] / "sample_db"
    sys.path.insert(0, str(here))
    try:
        import build_demo
    finally:
        sys.path.remove(str(here))
    out = tmp_path / "demo.db"
    build_demo.build(out)
    with open_ledger(out, author="t") as lg:
        r3 = {r.requirement: r for r in lg.results("gantry-x-bench", "r3")}
        assert r3["GX-B1"].verdict == "fail"
        assert r3["GX-B1"].worst_variant.startswith("measured:")
        fam, controller, loop = lg.numeric_setup("gantry-x-bench", "r3")
        res = measure_family(fam, controller, loop, [("gain_margin", {})]).get("gain_margin")
        kinds = [v.kind for v in fam.variants]
        model = [x for x, k in zip(res.values, kinds) if k != "measured"]
        meas = [x for x, k in zip(res.values, kinds) if k == "measured"]
        assert len(meas) == 2 and min(model) >= 6.0 > max(meas)
        r5 = {r.requirement: r for r in lg.results("gantry-x-bench", "r5")}
        assert r5["GX-B1"].verdict == "pass" and r5["GX-B2"].verdict == "pass"


def test_measurements_round_trip_through_export_and_import(tmp_path):
    # The bench spec of the demo (two measured units) imported, exported (measurement files
    # beside the spec), imported again: the same plant content, the same stored points, the
    # provenance of the original bench files kept; a second export writes the same bytes.
    # The ledger's own rule (docs/spec-files.md; common practice, no source).
    from ledger.spec import dump_spec, export_spec, import_spec

    import shutil

    demo = Path(__file__).resolve().parents[1] / "sample_db"
    (tmp_path / "measured").mkdir()
    for f in ("gantry-x-unit1.csv", "gantry-x-unit2.csv"):
        shutil.copy(demo / "measured" / f, tmp_path / "measured" / f)
    bench = tmp_path / "bench.toml"
    bench.write_text('''
[[plant]]
name = "gantry-x-bench"
model = "Kf/(s*(m*s+b))"
input_unit = "A"
output_unit = "m"
[plant.params]
Kf = 12.0
m = { nominal = 1.15, tol = "10 %" }
b = 6.0
[plant.measured.unit-1]
file = "measured/gantry-x-unit1.csv"
measured_by = "bench team"
measured_at = "2026-11-20"
excitation = "0.2 A swept sine"
[plant.measured.unit-2]
file = "measured/gantry-x-unit2.csv"
min_coherence = 0.85
note = "belt retensioned"
''')
    with open_ledger(tmp_path / "a.db", create=True) as a:
        a.auto_verify = False
        import_spec(a, bench)
        pa = a.plant("gantry-x-bench")
        out = export_spec(a, tmp_path / "x" / "out.toml")
        first = dump_spec(a)
    files = sorted(p.name for p in (tmp_path / "x" / "out-measured").iterdir())
    assert files == ["gantry-x-bench.unit-1.csv", "gantry-x-bench.unit-2.csv"]
    with open_ledger(tmp_path / "b.db", create=True) as b:
        b.auto_verify = False
        import_spec(b, out)
        pb = b.plant("gantry-x-bench")
        second = dump_spec(b)
        export_spec(b, tmp_path / "y" / "out.toml")
        assert not import_spec(b, out).changed          # the same content: nothing new
    assert pb.measured == pa.measured and pb.version == pa.version == 1
    assert pa.measured["unit-1"]["meta"]["source"] == "measured/gantry-x-unit1.csv"
    assert first == second
    assert (tmp_path / "x" / "out.toml").read_text() == (tmp_path / "y" / "out.toml").read_text()
    for f in files:
        assert ((tmp_path / "x" / "out-measured" / f).read_bytes()
                == (tmp_path / "y" / "out-measured" / f).read_bytes())
