"""Large-move evidence: the HTML figure and the UI plot view show the simulated move beside the
linear step with the actuator's saturation intervals (issue 16 item 5, the moves half).

The numbers drawn are the engine's (tests/test_moves.py checks them against closed forms and
solve_ivp); here: what is drawn and where, and that the figure's curve is that simulation.
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from ledger.api import open_ledger
from tuihelp import settle

_PLANT = "400/(s*(0.02*s+1))"
_LEAD = "0.5*(s+15)/(15*(s/300+1))"


@pytest.fixture(scope="module")
def axis(tmp_path_factory):
    path = tmp_path_factory.mktemp("mvplot") / "mv.db"
    with open_ledger(path, create=True, author="tester") as lg:
        lg.add_plant("belt", _PLANT, input_unit="A", output_unit="mm")
        lg.add_loop("x", "belt", actuator_limit=2.0)
        lg.add_requirement("MV", title="move", statement="a 10 mm move settles in 250 ms",
                           metric="move_settling_time", limit="<= 250 ms",
                           settings={"move": "10 mm"}, loops=["x"])
        lg.add_revision("x", _LEAD, rationale="lead compensator only", label="fb")
        lg.add_revision("x", _LEAD, rationale="shaped reference", label="ff",
                        prefilter="1/(0.03*s+1)^2")
        yield lg


def test_move_curves_and_figure(axis):
    from ledger.curves import column_curves
    from ledger.exports.plots import entry_figure, figure_kind

    assert figure_kind("move_overshoot") == "move"
    cur = column_curves(axis, "x", "fb")
    t, y, sat, yf = cur.move(10.0)["nominal"]
    assert_allclose(yf, 10.0, rtol=1e-12)       # type-1 loop: no step error
    assert len(sat) >= 1 and sat[0][0] == 0.0    # 10 mm asks for more than 2 A at once
    lin = cur.step("r->y", 10.0)
    assert np.max(lin.y["nominal"]) > np.max(y)  # linear step overshoots, the limited move not
    req = axis.requirement("MV")
    res = axis.results("x", "fb")[0]
    svg = entry_figure(cur, req, res)
    for text in ("Large move r -&gt; y", "actuator at its limit", "linear step",
                 "settling-time limit"):
        assert text in svg.replace("->", "-&gt;")
    # the feedforward revision never saturates: no shaded interval in its figure
    cur_ff = column_curves(axis, "x", "ff")
    assert cur_ff.move(10.0)["nominal"][2] == ()
    assert "actuator at its limit" not in entry_figure(cur_ff, req, axis.results("x", "ff")[0])


def test_html_export_carries_the_move_figure(axis, tmp_path):
    from ledger.exports import export_html
    from ledger.history.matrix import build_matrix

    p = export_html(build_matrix(axis, "all"), tmp_path / "m.html", axis)
    html = p.read_text()
    assert html.count("Large move r -&gt; y") == 2  # one figure per revision column
    assert "actuator at its limit" in html


def test_plot_data_has_the_move(axis):
    from ledger.tui.plotdata import load_plot_data

    d = load_plot_data(axis, "x", "fb")
    assert d.move is not None and d.move.key == "MV" and d.move.amplitude == 10.0
    assert d.move.saturated and d.move.saturated[0][0] == 0.0
    # the linear step of the same amplitude ends at the same final value
    assert_allclose(d.move.linear[-1], d.move.y[-1], rtol=1e-3)
    assert any(b.kind == "settling" and b.key == "MV" for b in d.bounds)


async def test_plots_view_shows_the_move(axis):

    from ledger.tui.app import LedgerApp


    app = LedgerApp(ledger=axis)
    app.current_loop, app.current_label = "x", "fb"
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot, rounds=3)
        await pilot.press("5")
        await settle(pilot, rounds=3)
        d = app.screen.plot_data
        assert d is not None and d.move is not None and d.move.key == "MV"
        # the feedback-only revision saturates, the one with the shaped reference does not
        assert bool(d.move.saturated) == (d.label == "fb")
