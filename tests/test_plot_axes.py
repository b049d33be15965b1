"""Plot axes people read: step-plot horizon, log-axis ticks, the frequency unit per ledger,
and the HTML report's Bode plot in Hz.

Sources: first-order step y = 1 - exp(-t/tau) leaves the 2 % band at t = tau ln 50 (closed
form); |K/(jw (jw + 1))| = 1 at w^4 + w^2 = K^2 (closed form); f = w / (2 pi) (SI brochure:
the hertz is the unit of frequency, the angular frequency is 2 pi f).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from ledger import prefs
from ledger.tui.plotdata import log_ticks, settle_time, step_horizon


def test_settle_time_and_horizon_of_a_first_order_step():
    tau = 0.03
    t = np.linspace(0, 2.0, 200_001)
    y = 1 - np.exp(-t / tau)
    ts = settle_time(t, y, 1.0)
    assert ts == pytest.approx(tau * math.log(50), abs=2e-5)  # grid step 1e-5
    assert step_horizon(t, [y], [1.0]) == pytest.approx(3 * tau * math.log(50), abs=1e-4)
    # the slowest of several variants sets it; a time limit drawn stays visible
    y2 = 1 - np.exp(-t / (2 * tau))
    assert step_horizon(t, [y, y2], [1.0, 1.0]) == pytest.approx(6 * tau * math.log(50), abs=1e-4)
    assert step_horizon(t, [y], [1.0], limits=[0.5]) == pytest.approx(0.6)
    # capped at the simulated end
    assert step_horizon(t, [y], [1.0], limits=[5.0]) == pytest.approx(2.0)


def test_log_ticks_are_real_values():
    pos, labels = log_ticks(0.05, 300.0)
    assert pos == [-1.0, 0.0, 1.0, 2.0] and labels == ["0.1", "1", "10", "100"]
    pos, labels = log_ticks(2.0, 2e4)
    assert labels == ["10", "100", "1k", "1e4"]


def test_frequency_unit_per_ledger(tmp_path, monkeypatch):
    monkeypatch.setenv("LOOPLEDGER_CONFIG_DIR", str(tmp_path / "cfg"))
    a, b = str(tmp_path / "a.db"), str(tmp_path / "b.db")
    assert prefs.frequency_unit(a) == "Hz"  # default
    assert prefs.set_frequency_unit(a, "rad/s")
    assert prefs.frequency_unit(a) == "rad/s" and prefs.frequency_unit(b) == "Hz"
    with pytest.raises(ValueError):
        prefs.set_frequency_unit(a, "rpm")
    # a database URL is keyed without its password
    prefs.set_frequency_unit("postgresql+psycopg://u:secret@h/db", "rad/s")
    assert "secret" not in prefs.prefs_path().read_text()


def test_html_bode_in_hz(tmp_path):
    pytest.importorskip("matplotlib")
    from ledger.api import open_ledger
    from ledger.exports.evidence import column_curves
    from ledger.exports.plots import entry_plot

    lg = open_ledger(tmp_path / "b.db", create=True, author="tester")
    lg.add_plant("servo", "1/(s*(s+1))")
    lg.add_loop("pos", "servo")
    q = lg.add_requirement("PM", title="pm", statement="pm", metric="phase_margin",
                           limit=">= 45 deg", loops=["pos"])
    lg.add_revision("pos", "gain(4)", rationale="k4")
    curves = column_curves(lg, "pos", "r1")
    res = lg.results("pos")[0]
    wc = math.sqrt((-1 + math.sqrt(1 + 4 * 16)) / 2)
    for unit, k in (("Hz", 1 / (2 * math.pi)), ("rad/s", 1.0)):
        fig = entry_plot(curves, q, res, frequency_unit=unit)
        axm = fig.axes[0]
        assert axm.get_xscale() == "log"
        assert ("Hz" if unit == "Hz" else "rad/s") in axm.get_xlabel()
        marks = [ln for ln in axm.get_lines() if len(ln.get_xdata()) == 1]
        np.testing.assert_allclose(marks[0].get_xdata()[0], wc * k, rtol=1e-6)
        labels = [ln.get_label() for ln in fig.axes[1].get_lines()]
        assert any(f"at {wc * k:.4g} {unit}" in lab for lab in labels), labels
    lg.close()
