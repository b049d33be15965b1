"""What drives the worst case (issue 17, item 2): slopes of a requirement's worst value in each
toleranced plant parameter, against closed-form derivatives, the ranking, corner directions,
honest reports where there is no derivative, and the command line.

The loop of most cases is unity feedback round L = K/(s (tau s + 1)): closed loop
K/tau / (s^2 + s/tau + K/tau), so wn^2 = K/tau, 2 zeta wn = 1/tau, zeta = 1/(2 sqrt(K tau)).
Source for the overshoot: Ogata, *Modern Control Engineering*, 5th ed., section 5-3 (step
response of the standard second-order system), Mp = exp(-pi zeta / sqrt(1 - zeta^2)).
Source for the phase margin of this loop: Franklin, Powell and Emami-Naeini, *Feedback Control
of Dynamic Systems*, section 6.4: PM = atan(2 zeta / sqrt(sqrt(1 + 4 zeta^4) - 2 zeta^2))
(quoted from memory; checked below against the crossover found by hand:
|L(j wc)| = 1 gives wc^2 = (sqrt(1 + 4 K^2 tau^2) - 1) / (2 tau^2), PM = 90 deg - atan(tau wc)).
"""

from __future__ import annotations

import json
import math

import mpmath
import pytest
from numpy.testing import assert_allclose
from typer.testing import CliRunner

from ledger.api import open_ledger
from tuihelp import settle
from ledger.verification.drivers import worst_case_drivers
from ledger.verification.stencil import slope_from



def _digits50(f):
    """Run ``f`` at 50 significant digits (mpmath's precision is global: set it only here).
    The closed forms themselves follow the precision they are called at, as mpmath.diff
    needs (it raises the precision while differencing)."""
    import functools

    @functools.wraps(f)
    def run(*a, **kw):
        with mpmath.workdps(50):
            return f(*a, **kw)
    return run


# -- closed forms ------------------------------------------------------------------------------
def _zeta(K, tau):
    return 1 / (2 * mpmath.sqrt(mpmath.mpf(K) * mpmath.mpf(tau)))


def overshoot_pct(K, tau):
    z = _zeta(K, tau)
    return 100 * mpmath.exp(-mpmath.pi * z / mpmath.sqrt(1 - z * z))


def pm_deg(K, tau):
    z = _zeta(K, tau)
    return mpmath.degrees(mpmath.atan(2 * z / mpmath.sqrt(mpmath.sqrt(1 + 4 * z ** 4) - 2 * z * z)))


def pm_by_crossover(K, tau):
    K, tau = mpmath.mpf(K), mpmath.mpf(tau)
    wc = mpmath.sqrt((mpmath.sqrt(1 + 4 * K * K * tau * tau) - 1) / (2 * tau * tau))
    return 90 - mpmath.degrees(mpmath.atan(tau * wc))


@_digits50
def d_overshoot(K, tau, wrt):
    """Hand derivative: dMp/dzeta = -pi Mp (1 - zeta^2)^(-3/2); dzeta/dK = -zeta/(2K),
    dzeta/dtau = -zeta/(2 tau)."""
    z = _zeta(K, tau)
    dmp = -mpmath.pi * overshoot_pct(K, tau) * (1 - z * z) ** mpmath.mpf(-1.5)
    return dmp * (-z / (2 * (K if wrt == "K" else tau)))


@_digits50
def d_pm(K, tau, wrt):
    """The closed form differentiated at 50 digits (mpmath.diff)."""
    if wrt == "K":
        return mpmath.diff(lambda k: pm_deg(k, tau), K)
    return mpmath.diff(lambda t: pm_deg(K, t), tau)


@_digits50
def test_closed_forms_agree_with_each_other():
    # the two phase-margin forms and the hand derivative against mpmath.diff of Mp
    for K, tau in ((2.4, 0.6), (1.0, 0.5), (5.0, 0.3)):
        assert abs(pm_deg(K, tau) - pm_by_crossover(K, tau)) < mpmath.mpf(10) ** -40
        for wrt in ("K", "tau"):
            num = mpmath.diff(lambda x: overshoot_pct(x, tau) if wrt == "K"
                              else overshoot_pct(K, x), K if wrt == "K" else tau)
            assert abs(num - d_overshoot(K, tau, wrt)) < mpmath.mpf(10) ** -35


# -- the stencil on its own ----------------------------------------------------------------------
def _values(f, x0, h):
    return {k: f(x0 + k * h) for k in (-2, -1, 0, 1, 2)}


def test_stencil_smooth_with_truncation_estimate():
    # f = exp: f' = 1 at 0; central difference error h^2/6 f''' = h^2/6 (Taylor; Burden and
    # Faires, Numerical Analysis, section 4.1), which the Richardson estimate must find
    h = 1e-2
    s = slope_from(_values(math.exp, 0.0, h), h, value_rtol=1e-16)
    assert s.status == "smooth"
    assert_allclose(s.derivative, 1.0, rtol=0, atol=1.1 * h * h / 6)
    assert_allclose(s.derivative - 1.0, h * h / 6, rtol=1e-3)    # the error is the h^2 term
    assert_allclose(s.truncation, h * h / 6, rtol=1e-2)          # and the estimate finds it


@pytest.mark.parametrize("f, why", [
    (lambda x: abs(x - 0.005), "kink"),                 # slope -1 below, +1 above
    (lambda x: x + (1.0 if x > 0.012 else 0.0), "jump"),  # a jump between +h and +2h
])
def test_stencil_refuses_a_kink_or_a_jump(f, why):
    s = slope_from(_values(f, 0.0, 0.01), 0.01)
    assert s.status == "not smooth", why
    assert s.derivative is None and s.forward is not None and s.backward is not None


def test_stencil_one_side_missing_and_infinite_values():
    h = 0.1
    v = _values(lambda x: 2 * x, 1.0, h)
    one = slope_from({**v, 1: None, 2: None}, h, errors={1: "unstable", 2: "unstable"})
    assert one.status == "one-sided" and one.derivative is None
    assert_allclose(one.backward, 2.0, rtol=1e-12)               # exact for a straight line
    assert "unstable" in one.note
    cross = slope_from({**v, 2: math.inf}, h)
    assert cross.status == "not smooth" and "crossing" in cross.note
    flat = slope_from({k: math.inf for k in v}, h)
    assert flat.status == "infinite"


# -- ledgers -------------------------------------------------------------------------------------
def _second_order_ledger(path, K, tau, requirements):
    lg = open_ledger(path, create=True, author="tester")
    lg.add_plant("p", "K/(s*(tau*s+1))", params={"K": K, "tau": tau})
    lg.add_loop("pos", "p")
    for key, metric, limit in requirements:
        lg.add_requirement(key, title=key, statement=f"{metric} {limit}", metric=metric,
                           limit=limit, loops=["pos"], status="approved")
    lg.add_revision("pos", "gain(1)", rationale="unity feedback")
    return lg


def _check_slope(e, exact, width):
    """The central difference against the closed form, within its own error estimate (twice
    the Richardson truncation estimate plus the rounding estimate: the estimate is the h^2
    term itself to O(h^2) relative, so this holds on any machine), and that estimate small."""
    assert e.status == "smooth", e.note
    tol = 2 * e.truncation / width + e.rounding / width
    assert abs(e.derivative - exact) <= tol, (e.parameter, e.derivative, exact, tol)
    assert tol <= 1e-4 * abs(exact)       # a loose comparison would pass anything


@pytest.fixture
def second_order(tmp_path):
    lg = _second_order_ledger(tmp_path / "so.db", {"nominal": 2.0, "tol": "20 %"},
                              {"nominal": 0.5, "tol": "20 %"},
                              [("OS-1", "overshoot", "<= 30 %"), ("PM-1", "phase_margin", ">= 30 deg")])
    yield lg
    lg.close()


def test_overshoot_and_phase_margin_slopes_against_closed_form(second_order):
    # worst corner of both: K and tau high (zeta smallest, both metrics depend on zeta only)
    by_key = {d.requirement: d for d in worst_case_drivers(second_order, "pos")}
    K, tau = 2.4, 0.6
    for key, exact in (("OS-1", d_overshoot), ("PM-1", d_pm)):
        d = by_key[key]
        assert d.worst_variant == "corner:K+,tau+" and d.variant_kind == "corner"
        effects = {e.parameter: e for e in d.effects}
        for name, width in (("K", 0.8), ("tau", 0.2)):
            _check_slope(effects[name], float(exact(K, tau, name)), width)
            assert_allclose(effects[name].per_width, effects[name].derivative * width,
                            rtol=1e-12)
    # the value itself (the stencil's centre) against the closed form, 1e-9 relative (the
    # engine's refinement targets; DESIGN "exactness")
    # (1e-9: far looser than the engine's refinement of extrema, xtol 1e-13, and its matrix
    # exponential; far tighter than any slope error that matters here)
    assert_allclose(by_key["OS-1"].recomputed, float(overshoot_pct(K, tau)), rtol=1e-9)
    assert_allclose(by_key["PM-1"].recomputed, float(pm_deg(K, tau)), rtol=1e-9)


def test_corner_direction_and_band_ends(second_order):
    d = next(x for x in worst_case_drivers(second_order, "pos", keys=["OS-1"]))
    assert d.corner_directions() == {"K": "high", "tau": "high"}
    for e in d.effects:
        assert e.worse_when == "higher"               # more K tau, less damping, more overshoot
        assert e.other_corner_variant == ("corner:K-,tau+" if e.parameter == "K"
                                          else "corner:K+,tau-")
        lo_K = 1.6 if e.parameter == "K" else 2.4
        lo_tau = 0.4 if e.parameter == "tau" else 0.6
        # the band's low end is the cached corner across: the closed form there
        assert_allclose(e.value_low, float(overshoot_pct(lo_K, lo_tau)), rtol=1e-9)
        assert_allclose(e.value_high, float(overshoot_pct(2.4, 0.6)), rtol=1e-9)


def test_corner_direction_low_and_a_parameter_without_effect(tmp_path):
    # ramp error of a type-1 loop = 1/Kv = 1/K (velocity constant Kv = lim s L(s) = K;
    # Ogata, section 5-8): worst at K low, tau has no effect; d/dK = -1/K^2
    lg = _second_order_ledger(tmp_path / "ramp.db", {"nominal": 2.0, "tol": "20 %"},
                              {"nominal": 0.5, "tol": "20 %"},
                              [("RE-1", "ramp_error", "<= 1")])
    d = worst_case_drivers(lg, "pos")[0]
    assert d.corner_directions()["K"] == "low"
    K = {e.parameter: e for e in d.effects}["K"]
    tau = {e.parameter: e for e in d.effects}["tau"]
    assert [e.parameter for e in d.effects] == ["K", "tau"]
    _check_slope(K, -1 / 1.6 ** 2, 0.8)
    assert K.worse_when == "lower"
    assert abs(tau.per_width) <= tau.rounding and tau.worse_when == ""
    lg.close()


@pytest.mark.parametrize("k_tol, tau_tol, first", [("50 %", "1 %", "K"), ("1 %", "50 %", "tau")])
def test_ranking_puts_the_dominant_parameter_first(tmp_path, k_tol, tau_tol, first):
    # overshoot depends on K tau only, so d/dlnK = d/dln tau: the value change per tolerance
    # width is in the ratio of the relative widths, 50 to 1 (closed form above)
    lg = _second_order_ledger(tmp_path / "rank.db", {"nominal": 2.0, "tol": k_tol},
                              {"nominal": 0.5, "tol": tau_tol}, [("OS-1", "overshoot", "<= 40 %")])
    d = worst_case_drivers(lg, "pos")[0]
    assert d.effects[0].parameter == first
    a, b = d.effects
    at = {"K": 2.0 * (1 + (0.5 if first == "K" else 0.01)),
          "tau": 0.5 * (1 + (0.5 if first == "tau" else 0.01))}      # the worst corner: both high
    widths = {"K": 2.0 * (1.0 if first == "K" else 0.02),
              "tau": 0.5 * (1.0 if first == "tau" else 0.02)}
    for e in (a, b):
        _check_slope(e, float(d_overshoot(at["K"], at["tau"], e.parameter)), widths[e.parameter])
    # d/dK K = d/dtau tau, so the ratio of the changes per width is that of the relative widths
    # at the corner: (W_a / p_a) / (W_b / p_b), here 2/3 : 0.01/0.505 = 33.7
    want = (widths[a.parameter] / at[a.parameter]) / (widths[b.parameter] / at[b.parameter])
    assert want > 30
    assert_allclose(a.per_width / b.per_width, want, rtol=1e-4)
    lg.close()


def test_settling_time_jump_is_reported_not_differentiated(tmp_path):
    # The settling time of the standard second-order loop jumps where the first overshoot
    # equals the 2 % band: exp(-pi zeta / sqrt(1 - zeta^2)) = 0.02, i.e. zeta / sqrt(1 -
    # zeta^2) = ln 50 / pi (Ogata, section 5-3; common practice: the settling-time curve is
    # saw-toothed in zeta).  With tau = 1, K* = 1 / (4 zeta*^2).  Just above K* the response
    # re-enters the band after its first peak (later) than just below: the worst corner is
    # K high, put half a step above K*, so the stencil straddles the jump (a narrow band: over
    # a wide one the low corner, better damped and slower, would be worse).
    a = math.log(50) / math.pi
    k_star = (1 + a * a) / (4 * a * a)
    width = 0.02
    high = k_star + 0.5 * 0.01 * width
    lg = _second_order_ledger(tmp_path / "ts.db",
                              {"nominal": high - width / 2, "low": high - width, "high": high},
                              1.0, [("TS-1", "settling_time", "<= 20 s")])
    d = worst_case_drivers(lg, "pos")[0]
    assert d.worst_variant == "corner:K+"
    e = d.effects[0]
    assert e.status == "not smooth" and e.per_width is None and e.derivative is None
    assert e.forward is not None and e.backward is not None
    lg.close()


def test_instability_within_the_stencil_is_reported(tmp_path):
    # L = K / (s (s + 1) (s + 2)): characteristic polynomial s^3 + 3 s^2 + 2 s + K, stable for
    # 0 < K < 6 (Routh-Hurwitz; Ogata, section 5-6).  K high half a step below 6: the points
    # above the worst variant are unstable, so a metric that needs a stable loop (the peak
    # sensitivity; the phase margin is read off L and goes smoothly negative) has only the
    # slope from below.
    width = 1.0
    high = 6.0 - 0.5 * 0.01 * width
    lg = open_ledger(tmp_path / "u.db", create=True, author="tester")
    lg.add_plant("p", "K/(s*(s+1)*(s+2))",
                 params={"K": {"nominal": high - 0.5, "low": high - width, "high": high}})
    lg.add_loop("pos", "p")
    lg.add_requirement("MS-1", title="ms", statement="ms", metric="peak_sensitivity",
                       limit="<= 2", loops=["pos"], status="approved")
    lg.add_revision("pos", "gain(1)", rationale="unity feedback")
    d = worst_case_drivers(lg, "pos")[0]
    e = d.effects[0]
    assert d.worst_variant == "corner:K+"
    assert e.status == "one-sided" and e.derivative is None and e.forward is None
    assert e.backward is not None and e.backward > 0  # |S| peaks higher as K rises to 6
    assert "unstable" in e.note
    lg.close()


# -- the command line ----------------------------------------------------------------------------
def test_cli_results_why(tmp_path, monkeypatch, second_order):
    from ledger.cli import app

    monkeypatch.setenv("LOOPLEDGER_DB", second_order.url)
    monkeypatch.setenv("COLUMNS", "220")
    runner = CliRunner()
    before = second_order.counts()
    res = runner.invoke(app, ["results", "pos", "--why", "OS-1"])
    assert res.exit_code == 0, res.output
    out = res.output
    assert "what drives OS-1 v1 (overshoot <= 30 %) on pos/r1" in out
    assert "worst corner: K high, tau high" in out
    assert "drives it most" in out and "Caution" in out
    rows = [line.split() for line in out.splitlines() if line.strip()[:2] in ("1 ", "2 ")]
    assert [r[1] for r in rows] == [e.parameter for e in
                                    worst_case_drivers(second_order, "pos", keys=["OS-1"])[0].effects]
    data = json.loads(runner.invoke(app, ["results", "pos", "--why", "all", "--json"]).output)
    assert {d["requirement"] for d in data} == {"OS-1", "PM-1"}
    k = next(e for e in data[0]["effects"] if e["parameter"] == "K")
    assert_allclose(k["derivative"], float(d_overshoot(2.4, 0.6, "K")), rtol=1e-4)
    for args, words in ((["results", "pos", "--why", "NOPE"], "NOPE"),
                        (["results", "pos", "--why", " "], "--why")):
        bad = runner.invoke(app, args)
        assert bad.exit_code == 1 and bad.output.startswith("error: ") and words in bad.output
        assert len(bad.output.strip().splitlines()) == 1
    assert second_order.counts() == before                     # computed, stored nowhere


# -- the terminal UI and the HTML evidence ---------------------------------------------------------
async def test_requirement_view_shows_what_drives_the_worst_value(second_order):
    from textual.widgets import Static

    from ledger.tui.app import LedgerApp


    app = LedgerApp(ledger=second_order)
    app.current_req = "OS-1"
    async with app.run_test(size=(140, 60)) as pilot:
        await settle(pilot, rounds=4)
        await pilot.press("3")
        await settle(pilot, rounds=4)
        scr = app.screen
        text = str(scr.query_one("#req-drivers", Static).render())
        assert "what drives the worst value" in text
        assert "OS-1 v1 (overshoot <= 30 %) on pos/r1" in text
        assert "worst corner: K high, tau high" in text and "drives it most" in text
        assert "hardware testing" in text                         # the caution
        # next requirement: its own drivers, not the previous one's
        await pilot.press("n")
        await settle(pilot, rounds=4)
        text = str(scr.query_one("#req-drivers", Static).render())
        assert scr._data.requirement.key == "PM-1"
        assert "PM-1 v1 (phase_margin >= 30 deg)" in text and "OS-1" not in text


def test_html_evidence_carries_the_drivers(second_order, tmp_path):
    from ledger.exports import export_matrix
    from ledger.history.matrix import build_matrix

    before = second_order.counts()
    path = export_matrix(build_matrix(second_order, "tips"), tmp_path / "m.html",
                         ledger=second_order)
    page = path.read_text()
    assert page.count("What drives the worst value</h4>") == 2     # one per entry
    assert "worst corner: K high, tau high" in page
    assert "value change per tolerance width" in page and "hardware testing" in page
    assert second_order.counts() == before


def test_a_verdict_flip_within_the_stencil_is_said(tmp_path):
    # the limit put between the worst value and its value two steps inwards (closed-form
    # overshoot at K = 2.4 and K = 2.4 - 2 x 0.008, tau = 0.5): the slope is still smooth, and
    # the view says that the verdict flips there
    hi, lo = float(overshoot_pct(2.4, 0.5)), float(overshoot_pct(2.4 - 0.016, 0.5))
    limit = (hi + lo) / 2
    lg = _second_order_ledger(tmp_path / "flip.db", {"nominal": 2.0, "tol": "20 %"}, 0.5,
                              [("OS-1", "overshoot", f"<= {limit:.12g} %")])
    d = worst_case_drivers(lg, "pos")[0]
    assert d.verdict == "fail"
    e = d.effects[0]
    assert e.status == "smooth" and "verdict flips" in e.note
    _check_slope(e, float(d_overshoot(2.4, 0.5, "K")), 0.8)
    lg.close()


def test_fidelity_worst_variant_is_perturbed_in_its_own_model(tmp_path):
    # The full-order model (an extra lag te) is evaluated at the nominal parameters only; its
    # phase margin is the worst.  Its band ends must be the full-order model's margins at K low
    # and high, checked against python-control's stability_margins (a general-purpose
    # reference; phase margin of a continuous transfer function, by polynomial roots).
    import control

    lg = open_ledger(tmp_path / "fid.db", create=True, author="tester")
    lg.add_plant("p", "K/(s*(tau*s+1))", params={"K": {"nominal": 2.0, "tol": "20 %"},
                                                  "tau": 0.5, "te": 0.3},
                 fidelity={"full": "K/(s*(tau*s+1)*(te*s+1))"})
    lg.add_loop("pos", "p")
    lg.add_requirement("PM-1", title="pm", statement="pm", metric="phase_margin",
                       limit=">= 20 deg", loops=["pos"], status="approved")
    lg.add_revision("pos", "gain(1)", rationale="unity feedback")
    d = worst_case_drivers(lg, "pos")[0]
    assert d.worst_variant == "fidelity:full" and d.variant_kind == "fidelity"
    e = d.effects[0]
    assert e.place == "nominal" and e.status == "smooth" and e.worse_when == "higher"

    def pm(K):
        return control.stability_margins(control.tf([K], [0.15, 0.8, 1, 0]))[1]

    assert_allclose([e.value_low, e.value_high], [pm(1.6), pm(2.4)], rtol=1e-8)
    assert_allclose(d.recomputed, pm(2.0), rtol=1e-8)
    lg.close()


def test_stale_results_and_bad_requests_are_refused_or_said(second_order):
    from ledger.errors import NotFoundError, UsageError

    with pytest.raises(NotFoundError, match="no loop named 'nope'"):
        worst_case_drivers(second_order, "nope")
    with pytest.raises(NotFoundError, match="'XX-1'"):
        worst_case_drivers(second_order, "pos", keys=["XX-1"])
    with pytest.raises(UsageError, match="step"):
        worst_case_drivers(second_order, "pos", step=0.5)
    # a new plant version: the results are stale until verify runs, so nothing is traced
    second_order.auto_verify = False
    second_order.add_plant("p", "K/(s*(tau*s+1))", params={"K": {"nominal": 2.0, "tol": "30 %"},
                                                           "tau": {"nominal": 0.5, "tol": "20 %"}})
    d = worst_case_drivers(second_order, "pos", keys=["OS-1"])[0]
    assert d.effects == () and "run `loopledger verify`" in d.note
    second_order.verify("pos")
    d = worst_case_drivers(second_order, "pos", keys=["OS-1"])[0]
    assert d.effects and d.effects[0].high == pytest.approx(2.6)


def test_a_value_no_parameter_moves(tmp_path):
    # peak effort of unity feedback round a strictly proper plant: u(0+) = r = 1 and |u| <= 1
    # after (u = 1 - y, y overshoots by 16-30 % here, so u >= -0.3): sup |u| = 1 on every
    # variant (initial value theorem; common practice, no source)
    lg = _second_order_ledger(tmp_path / "pe.db", {"nominal": 2.0, "tol": "20 %"},
                              {"nominal": 0.5, "tol": "20 %"}, [("PE-1", "peak_effort", "<= 2")])
    d = worst_case_drivers(lg, "pos")[0]
    assert_allclose(d.value, 1.0, rtol=1e-12)
    assert "one of equals" in d.note
    assert all(abs(e.per_width) <= e.rounding and e.worse_when == "" for e in d.effects)
    lg.close()


def test_demo_ledger_every_tip_traces(tmp_path):
    """On the demo ledger (invented data, sample_db/README.md) every requirement of every loop's
    tip gives its drivers or says why not, and a corner's directions are the corner's own signs
    (corner names: ``+`` high, ``-`` low; ledger/systems/family.py)."""
    import re
    import shutil
    from pathlib import Path

    src = Path(__file__).resolve().parents[1] / "sample_db" / "demo.db"
    shutil.copy(src, tmp_path / "demo.db")
    lg = open_ledger(tmp_path / "demo.db")
    seen = 0
    for lp in lg.loops():
        for d in worst_case_drivers(lg, lp.name):
            assert d.effects or d.note, d
            if d.variant_kind == "corner":
                signs = dict(re.findall(r"([A-Za-z_]\w*)([+-])", d.worst_variant.split(":", 1)[1]))
                assert d.corner_directions() == {n: "high" if s == "+" else "low"
                                                 for n, s in signs.items()}
                seen += 1
            for e in d.effects:
                assert e.status in ("smooth", "not smooth", "one-sided", "steps", "infinite",
                                    "cannot", "not used")
                if e.status == "smooth":
                    assert e.truncation is not None and e.rounding is not None
    assert seen > 0
    lg.close()


def test_change_text_linearises_in_the_shown_unit():
    from ledger.display import change_text

    # d(20 log10 v) = 20 / (v ln 10) dv (calculus): a change of 0.01 at Ms = 1.5 limited in dB
    assert change_text(1.5, 0.01, "ratio", "<= 6 dB") == f"{20 / (1.5 * math.log(10)) * 0.01:+.4g} dB"
    # seconds beside a limit in ms read in ms; a percentage reads in percentage points
    assert change_text(0.17, 0.0196, "s", "<= 200 ms") == "+19.6 ms"
    assert change_text(9.6, 6.25, "%", "<= 25 %") == "+6.25 %pt"
    assert change_text(1.0, None, "s", "") == "-"


def test_ranking_ties_within_the_error_keep_the_plants_order():
    # K and tau of K/(s(tau s+1)) with equal relative tolerances change the damping alike, so
    # their effects on overshoot agree to rounding: that must not decide the order (it did on
    # one BLAS kernel and not another).  Effects differing beyond their errors rank by size.
    # The ledger's own rule (docs/history.md; common practice, no source).
    from ledger.verification.drivers import ParameterEffect, ranked

    def eff(name, per_width, err):
        return ParameterEffect(name, 0.9, 1.0, 1.1, 1.1, "high", "smooth", per_width=per_width,
                               truncation=err, rounding=0.0)

    a, b = eff("K", 1.0, 1e-10), eff("tau", 1.0 + 1e-12, 1e-10)
    assert [e.parameter for e in ranked([a, b])] == ["K", "tau"]
    assert [e.parameter for e in ranked([b, a])] == ["tau", "K"]   # the given (plant) order
    c = eff("m", 2.0, 1e-10)
    assert [e.parameter for e in ranked([a, b, c])] == ["m", "K", "tau"]
    assert [e.parameter for e in ranked([a, eff("tau", 1.0 + 1e-6, 1e-10)])] == ["tau", "K"]
