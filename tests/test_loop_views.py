"""Nyquist and Nichols views of a plant family with measured members (issue 15 items 3, 4):
the plotted numbers against python-control and closed forms, the HTML figures, the UI panels.

The ledger: plant k/(s (s+1) (0.2 s+1)) with k = 2 (nominal), 1.5 and 2.5 (corners); a
measured member sampled exactly from the "true" plant 2.2/(s (s+1) (0.25 s+1)) at 120 points,
four of them with coherence below 0.8; lead controller (0.5 s+1)/(0.05 s+1), unity sensor.
"""

from __future__ import annotations

import html
import math
import re

import control
import numpy as np
import pytest
from numpy.testing import assert_allclose

from ledger.api import open_ledger
from ledger.loopviews import (disk_region, frequency_marks, loop_views, m_contour, ms_circle,
                              nichols_phase, pick_members)
from ledger.systems.measured import measured_response

C = control.tf([0.5, 1.0], [0.05, 1.0])
K = {"nominal": 2.0, "corner:k-": 1.5, "corner:k+": 2.5}
TRUE = control.tf([2.2], [0.25, 1.25, 1.0, 0.0])   # 2.2/(s (s+1) (0.25 s+1))
W_MEAS = np.logspace(math.log10(0.05), 2, 120)
LOW_COH = (60, 61, 62, 90)


def plant(k: float):
    return control.tf([k], [0.2, 1.2, 1.0, 0.0])   # k/(s (s+1) (0.2 s+1))


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    path = tmp_path_factory.mktemp("views") / "v.db"
    lg = open_ledger(path, create=True, author="t")
    lg.add_plant("p", "k/(s*(s+1)*(0.2*s+1))",
                 params={"k": {"nominal": 2.0, "low": 1.5, "high": 2.5}})
    coh = np.full(W_MEAS.size, 0.97)
    coh[list(LOW_COH)] = 0.4
    g = np.asarray(TRUE(1j * W_MEAS), complex)
    lg.add_measurement("p", "unit-1", measured_response(W_MEAS, g, coherence=coh,
                                                        integrators=1))
    lg.add_loop("x", "p")
    for key, metric, limit, settings in (
            ("PS-1", "peak_sensitivity", "<= 2.0", None), ("DM-1", "disk_margin", ">= 0.5", None),
            ("GM-1", "gain_margin", ">= 6 dB", None),
            ("FIT-1", "model_fit", "<= 3 dB", {"frequency": 20.0})):
        lg.add_requirement(key, title=key, statement=key, metric=metric, limit=limit,
                           settings=settings, loops=["x"], status="approved")
    lg.add_revision("x", "(0.5*s+1)/(0.05*s+1)", rationale="lead", label="r1")
    lg.close()
    return path


@pytest.fixture
def lg(built):
    with open_ledger(built, author="t") as led:
        yield led


def test_curves_equal_python_control_frequency_response(lg):
    v = loop_views(lg, "x", "r1")
    assert v.names == ("nominal", "corner:k-", "corner:k+", "measured:unit-1")
    for m in v.members[:3]:
        # Source: python-control frequency_response of C G at the same frequencies; relative
        # rounding of a third-order rational function evaluated at w in the display grid
        ref = control.frequency_response(C * plant(K[m.name]), m.w)
        L_ref = np.asarray(ref.complex).reshape(-1)
        assert_allclose(m.L, L_ref, rtol=1e-9)
        G_ref = np.asarray(control.frequency_response(plant(K[m.name]), m.w).complex).ravel()
        assert_allclose(m.G, G_ref, rtol=1e-9)
    meas = v.member("measured:unit-1")
    kept = np.setdiff1d(np.arange(W_MEAS.size), LOW_COH)
    # the measured member is drawn at its measured points, the low-coherence ones apart
    assert_allclose(meas.w, W_MEAS[kept], rtol=0)
    assert_allclose(meas.w_excluded, W_MEAS[list(LOW_COH)], rtol=0)
    # Source: python-control frequency_response of C times the plant the data were sampled
    # from (the data are exact samples of it)
    for w, L in ((meas.w, meas.L), (meas.w_excluded, meas.L_excluded)):
        ref = np.asarray(control.frequency_response(C * TRUE, w).complex).ravel()
        assert_allclose(L, ref, rtol=1e-9)


def test_ms_circle_and_disk_from_the_engine(lg):
    v = loop_views(lg, "x", "r1")
    res = {r.requirement: r for r in lg.results("x", "r1")}
    for m in v.members:
        # Source: python-control frequency_response on a dense grid: max |1/(1+L)| is a lower
        # bound of Ms within the grid's sampling (1e-3 relative at 4000 points per decade for
        # these smooth curves), and never above the engine's refined peak
        w = np.logspace(-2, 2.0 if m.measured else 3.0, 16001)
        if m.measured:
            w = w[(w >= m.w[0]) & (w <= m.w[-1])]
            L = np.asarray(control.frequency_response(C * TRUE, w).complex).ravel()
        else:
            L = np.asarray(control.frequency_response(C * plant(K[m.name]), w).complex).ravel()
        dense = float(np.max(np.abs(1 / (1 + L))))
        tol = 2e-3 if m.measured else 1e-6  # data: interpolation error of 120 points
        assert dense <= m.ms * (1 + tol) and m.ms <= dense * (1 + 2e-3), (m.name, dense, m.ms)
        # Source: the definition in ledger/engine/margins.py, alpha = 1 / sup |S - 1/2|
        dense_a = 1.0 / float(np.max(np.abs(1 / (1 + L) - 0.5)))
        assert_allclose(m.alpha, dense_a, rtol=2e-3)
    worst = res["PS-1"].worst_variant
    # the ledger's verified Ms of the worst variant is the radius of the circle drawn
    assert v.member(worst).ms == pytest.approx(res["PS-1"].value, rel=1e-9)
    c, r, pts = ms_circle(v.member(worst).ms)
    # Source: closed form, |1 + L| = 1/Ms on the circle
    assert c == -1 and r == pytest.approx(1 / res["PS-1"].value, rel=1e-12)
    assert_allclose(np.abs(pts + 1), r, rtol=1e-12)
    assert v.worst_disk() == res["DM-1"].worst_variant


@pytest.mark.parametrize("alpha", [0.05, 0.4, 0.8461, 1.5, 1.99])
def test_disk_region_closed_form(alpha):
    c, r, pts = disk_region(alpha)
    S = 1.0 / (1.0 + pts)
    # Source: definition of the balanced disk margin (Seiler, Packard and Gahinet, "An
    # introduction to disk margins", IEEE Control Systems Magazine, 2020): on the boundary of
    # the excluded region |S - 1/2| = 1/alpha
    assert_allclose(np.abs(S - 0.5), 1.0 / alpha, rtol=1e-9)
    # its diameter on the real axis is the disk margin's gain interval (same source):
    # -1/L runs over [(1 - a/2)/(1 + a/2), (1 + a/2)/(1 - a/2)]
    h = alpha / 2
    # c + r cancels: its rounding is a few ulps of |c| (the disk grows like 1/(1 - h^2))
    assert_allclose(np.real([c - r, c + r]), [-(1 + h) / (1 - h), -(1 - h) / (1 + h)],
                    rtol=1e-12, atol=8 * np.finfo(float).eps * abs(c))
    assert disk_region(0.0) is None and disk_region(2.0) is None


def test_highlighted_curve_stays_out_of_its_disk(lg):
    v = loop_views(lg, "x", "r1")
    for m in v.members:
        c, r, _ = disk_region(m.alpha)
        # the curve touches but never enters: alpha is the sup over all w (engine, refined),
        # the curve is sampled (a point inside would be a larger |S - 1/2|)
        assert np.min(np.abs(m.L - c) - r) >= -1e-9 * (1 + abs(c))


@pytest.mark.parametrize("m_db", [12.0, 6.0, 3.0, 1.0, 0.0, -1.0, -3.0, -6.0, -12.0])
def test_m_contours_satisfy_closed_form(m_db):
    ph, db = m_contour(m_db)
    L = 10 ** (db / 20) * np.exp(1j * np.radians(ph))
    # Source: closed form T = L / (1 + L); every contour point has |T| = M
    assert_allclose(np.abs(L / (1 + L)), 10 ** (m_db / 20), rtol=1e-9)
    assert ph.min() >= -360.0 and ph.max() <= 0.0
    if m_db > 0:  # closed curves round the critical point (-180 deg, 0 dB)
        assert ph[0] == ph[-1] and ph.min() < -180.0 < ph.max()


def test_nichols_phase_and_frequency_marks():
    # Source: python-control stability_margins for the crossover; closed form for the
    # resonant peak of K wn^2/(s^2 + 2 zeta wn s + wn^2): wr = wn sqrt(1 - 2 zeta^2)
    # (Ogata, Modern Control Engineering, ch. 8, from memory)
    wn, zeta = 10.0, 0.05
    sys = control.tf([3 * wn ** 2], [1.0, 2 * zeta * wn, wn ** 2])
    w = np.logspace(-1, 3, 2401)
    L = np.asarray(control.frequency_response(sys, w).complex).ravel()
    marks = frequency_marks(w, L, hz=False, window=None)
    text = dict(marks)
    wc = control.stability_margins(sys)[5]
    step = 10 ** (4 / 2400)
    (j_wc,) = [j for j, t in marks if t.startswith("wc")]
    assert w[j_wc] / wc == pytest.approx(1.0, abs=step - 1)
    (j_pk,) = [j for j, t in marks if t.startswith("peak")]
    assert w[j_pk] / (wn * math.sqrt(1 - 2 * zeta ** 2)) == pytest.approx(1.0, abs=step - 1)
    assert {"0.1 rad/s", "1 rad/s", "100 rad/s"} <= set(text.values())
    ph = nichols_phase(L)
    k = int(np.argmin(np.abs(np.abs(L) - 1)))
    assert -360.0 <= ph[k] < 0.0


def test_pick_members_keeps_nominal_wanted_and_measured():
    from types import SimpleNamespace as V

    vs = [V(name="nominal", kind="nominal")] + [V(name=f"s{i}", kind="sample")
                                                for i in range(100)] \
        + [V(name="measured:a", kind="measured")]
    got = pick_members(vs, wanted={"s57"}, limit=10)
    names = [vs[i].name for i in got]
    assert len(got) == 10 and names[0] == "nominal" and "s57" in names and "measured:a" in names


def test_html_has_nyquist_nichols_and_measured_overlay(lg, tmp_path):
    from lxml import html as lh

    from ledger.exports import export_matrix
    from ledger.history.matrix import build_matrix

    path = tmp_path / "r.html"
    export_matrix(build_matrix(lg), path, ledger=lg)
    doc = lh.fromstring(path.read_bytes())
    fam = doc.xpath("//div[contains(@class, 'family-views')]")
    assert fam, "no family figure"
    res = {r.requirement: r for r in lg.results("x", "r1")}
    words = " ".join(fam[0].itertext())
    for needle in ("Nyquist", "Nichols", "critical point -1", "Ms circle",
                   "disk-margin exclusion disk", "closed-loop |T| contours",
                   "measured points left out (low coherence)", "measured:unit-1"):
        assert needle in words, needle
    # one figure per highlighted member, later entries link to it
    assert len(fam) == len({res[k].worst_variant for k in ("PS-1", "DM-1", "GM-1", "FIT-1")})
    links = doc.xpath("//a[starts-with(@href, '#family--')]")
    assert all(doc.get_element_by_id(a.get("href")[1:]) is not None for a in links)
    # the Bode evidence of GM-1 carries the measured member; FIT-1 the plant against the data
    sect = {s.get("id").split("--")[0]: " ".join(s.itertext())
            for s in doc.xpath("//section[@class='evidence']")}
    assert "measured:unit-1 (measured)" in sect["GM-1"]
    for key, curve in (("PS-1", "|S|"), ("DM-1", "|S - T|")):
        assert re.search(re.escape(curve) + r" (worst variant: )?measured:unit-1 \(measured\)",
                         sect[key]), key
    assert "design model (nominal)" in sect["FIT-1"] and "compared up to" in sect["FIT-1"]
    assert "points left out (low coherence)" in sect["FIT-1"]
    for key, text in sect.items():  # the fields say which members were measured
        assert "Measured members measured:unit-1" in " ".join(text.split())
        assert ("(a measured member)" in text) == (res[key].worst_variant == "measured:unit-1")
    assert "does not replace hardware testing" in path.read_text()


def test_exports_flag_measured_members(lg, tmp_path):
    import csv
    import json

    from openpyxl import load_workbook

    from ledger.exports import export_matrix
    from ledger.history.matrix import build_matrix

    m = build_matrix(lg)
    for ext in ("csv", "json", "xlsx"):
        export_matrix(m, tmp_path / f"m.{ext}")
    rows = list(csv.DictReader((tmp_path / "m.csv").read_text().splitlines()[1:]))
    doc = json.loads((tmp_path / "m.json").read_text())
    sh = load_workbook(tmp_path / "m.xlsx")["x"]
    head = [c.value for c in sh[1]]
    xl = [dict(zip(head, [c.value for c in r])) for r in sh.iter_rows(min_row=2)]
    res = {r.requirement: r for r in lg.results("x", "r1")}
    for rc, rj, rx in zip(rows, doc["rows"], xl):
        worst = res[rc["requirement"]].worst_variant
        flag = worst == "measured:unit-1"
        assert rc["worst_measured"] == ("true" if flag else "false")
        assert rj["worst_measured"] is flag and rx["worst_measured"] is flag
        assert rc["measured_members"] == rj["measured_members"] == rx["measured_members"] \
            == "measured:unit-1"
    assert any(r["worst_measured"] == "true" for r in rows)
    from ledger.exports.rows import json_schema_path
    import jsonschema

    jsonschema.validate(doc, json.loads(json_schema_path().read_text()))


def test_results_command_names_measured_members(built, tmp_path, monkeypatch):
    import shutil

    from typer.testing import CliRunner

    from ledger.cli import app

    db = tmp_path / "c.db"
    shutil.copy(built, db)
    monkeypatch.setenv("COLUMNS", "200")
    out = CliRunner().invoke(app, ["--db", str(db), "results", "x", "r1"],
                             env={"LOOPLEDGER_AUTHOR": "t"})
    assert out.exit_code == 0, out.output
    lines = out.output.splitlines()
    assert "  measured members: measured:unit-1" in lines
    with open_ledger(db) as led:
        worst = [r.requirement for r in led.results("x", "r1")
                 if r.worst_variant == "measured:unit-1"]
    assert worst  # the data's plant is the worse one for some requirement of this ledger
    assert f"  worst on a measured member: {', '.join(worst)}" in lines


async def test_ui_plot_view_draws_the_measured_members(built, tmp_path):
    import shutil

    from ledger.tui.app import LedgerApp

    db = tmp_path / "u.db"
    shutil.copy(built, db)
    with open_ledger(db, author="t") as led:
        res = {r.requirement: r for r in led.results("x", "r1")}
        app = LedgerApp(ledger=led)
        async with app.run_test(size=(140, 50)) as pilot:
            for _ in range(3):
                await pilot.pause()
                await pilot.app.workers.wait_for_complete()
            app.select("x", "r1")
            app.current_req = "PS-1"
            await pilot.press("5")
            for _ in range(4):
                await pilot.pause()
                await pilot.app.workers.wait_for_complete()
            await pilot.pause()
            d = app.screen.plot_data
            fam = d.family
            assert fam is not None, d.family_note
            names = [m.name for m in fam.members]
            assert names == ["nominal", "corner:k-", "corner:k+", "measured:unit-1"]
            meas = fam.members[-1]
            assert meas.measured and len(meas.bode_excluded[0]) == len(LOW_COH)
            assert fam.highlight == res["PS-1"].worst_variant
            assert fam.ms == pytest.approx(res["PS-1"].value, rel=1e-9)
            cap = str(app.screen.query_one("#plots-caption").render())
            assert "1 measured" in cap and f"highlighted {fam.highlight}" in cap
            # the panels were drawn: their titles and the measured member's legend on screen
            svg = app.export_screenshot()
            screen = html.unescape(" ".join(re.findall(r">([^<]+)</text>", svg)))
            for needle in ("Nyquist", "Nichols", "measured:unit-1", "1/Ms"):
                assert needle in screen.replace("\xa0", " "), needle


def test_overlays_plot_the_measured_numbers(lg):
    from ledger.curves import column_curves
    from ledger.exports.plots import entry_plot

    v = loop_views(lg, "x", "r1")
    res = {r.requirement: r for r in lg.results("x", "r1")}
    reqs = {q.key: q for q in lg.requirements()}
    cc = column_curves(lg, "x", "r1", worst={r.worst_variant for r in res.values()})
    meas = v.member("measured:unit-1")
    # Source: python-control frequency_response of C times the sampled plant
    L = np.asarray(control.frequency_response(C * TRUE, meas.w).complex).ravel()

    def line(fig, start, end="(measured)"):
        for ax in fig.axes:
            for ln in ax.get_lines():
                lab = ln.get_label()
                if lab.startswith(start) and lab.endswith(end):
                    return ln
        raise AssertionError(f"no line {start!r}")

    fig = entry_plot(cc, reqs["GM-1"], res["GM-1"], views=v, frequency_unit="Hz")
    ln = line(fig, "|L|")
    assert_allclose(ln.get_xdata(), meas.w / (2 * math.pi), rtol=1e-12)  # axes in Hz
    assert_allclose(ln.get_ydata(), 20 * np.log10(np.abs(L)), rtol=1e-9, atol=1e-9)
    fig = entry_plot(cc, reqs["PS-1"], res["PS-1"], views=v, frequency_unit="rad/s")
    assert_allclose(line(fig, "|S|").get_ydata(), np.abs(1 / (1 + L)), rtol=1e-9)
    assert_allclose(line(fig, "|T|").get_ydata(), np.abs(L / (1 + L)), rtol=1e-9)
    fig = entry_plot(cc, reqs["DM-1"], res["DM-1"], views=v, frequency_unit="rad/s")
    assert_allclose(line(fig, "|S - T|").get_ydata(), np.abs((1 - L) / (1 + L)), rtol=1e-9)
    fig = entry_plot(cc, reqs["FIT-1"], res["FIT-1"], views=v, frequency_unit="rad/s")
    G = np.asarray(control.frequency_response(TRUE, meas.w).complex).ravel()
    assert_allclose(line(fig, "worst: measured:unit-1").get_ydata(),
                    20 * np.log10(np.abs(G)), rtol=1e-9, atol=1e-9)


def test_unstable_loop_draws_with_the_reason(tmp_path):
    from ledger.exports.loopplots import family_figure

    # Source: Routh-Hurwitz on s^3 + 6 s^2 + 5 s + 5 K (G = 1/(s (s+1) (0.2 s+1)) times K):
    # unstable for K > 6; K = 20 is well past it
    with open_ledger(tmp_path / "u.db", create=True, author="t") as led:
        led.add_plant("p", "1/(s*(s+1)*(0.2*s+1))")
        led.add_loop("x", "p")
        led.add_revision("x", "20", rationale="too much gain", label="r1")
        v = loop_views(led, "x", "r1")
        m = v.members[0]
        assert math.isnan(m.ms) and "stable" in m.note
        assert m.alpha == 0.0 or math.isnan(m.alpha)
        fig = family_figure(v)
        labels = [t.get_text() for ax in fig.axes if ax.get_legend()
                  for t in ax.get_legend().get_texts()]
        assert any(t.startswith("no Ms circle:") for t in labels)
        assert not any(t.startswith("Ms circle") for t in labels)
