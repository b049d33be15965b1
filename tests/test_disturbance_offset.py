"""disturbance_offset and disturbance_recovery's recovery_to setting (issue 16 item 4).

References: the final-value theorem on the input-disturbance path
y(inf) = d G(0) / (1 + C(0) G(0) H(0)) (any control text, e.g. Franklin, Powell and
Emami-Naeini, "Feedback Control of Dynamic Systems", ch. 4 on system type and disturbance
rejection; from memory) and the closed-form first-order step response.
"""

import math

import control
import numpy as np
import pytest
from numpy.testing import assert_allclose

from ledger.engine import measure
from ledger.engine.metrics import resolve_settings
from ledger.errors import SpecError

s = control.tf("s")


@pytest.mark.parametrize("G0, K, amp", [(1.0, 4.0, 1.0), (2.5, 0.7, -3.0), (0.1, 30.0, 2.0)])
def test_offset_proportional_first_order(G0, K, amp):
    # G = G0/(s+1), C = K: y(inf) = amp G0 / (1 + K G0) (final-value theorem)
    m = measure(G0 / (s + 1), K, ["disturbance_offset"], amplitude=amp)
    assert_allclose(m["disturbance_offset"], abs(amp) * G0 / (1 + K * G0), rtol=1e-12)


def test_offset_zero_with_integrator_in_controller():
    # C with a pole at s = 0: C(0) infinite, the offset is 0 (system-type argument)
    m = measure(1 / (s + 1), 4 + 2 / s, ["disturbance_offset"])
    assert m["disturbance_offset"] == pytest.approx(0.0, abs=1e-12)


def test_offset_integrating_plant_proportional():
    # G = 1/(s(s+1)), C = K: y(inf) = lim G/(1+KG) = 1/K; the plant's integrator does not remove
    # an input-disturbance offset (final-value theorem)
    m = measure(1 / (s * (s + 1)), 4.0, ["disturbance_offset"])
    assert_allclose(m["disturbance_offset"], 0.25, rtol=1e-12)


def test_offset_digital_loop():
    # discrete: y(inf) = G(1)/(1 + K G(1)); G(z) = 0.5/(z - 0.5) has G(1) = 1, K = 0.8 (closed
    # loop pole 0.1) -> 1/1.8
    m = measure(control.tf([0.5], [1, -0.5], 0.01), control.tf([0.8], [1], 0.01),
                ["disturbance_offset"], sample_time=0.01)
    assert_allclose(m["disturbance_offset"], 1 / 1.8, rtol=1e-12)


def test_recovery_to_final_and_to_zero():
    # G = 1/(s+1), C = 4: y(t) = 0.2 (1 - e^{-5t}) (closed form); recovery to the final value
    # with band 2 % of the peak 0.2: e^{-5t} = 0.02 -> t = ln(50)/5; to zero: never (the offset
    # 0.2 is outside any band below the peak)
    m = measure(1 / (s + 1), 4.0, ["disturbance_recovery"])
    assert_allclose(m["disturbance_recovery"], math.log(50) / 5, rtol=1e-7)
    m0 = measure(1 / (s + 1), 4.0, ["disturbance_recovery"], recovery_to="zero")
    assert m0["disturbance_recovery"] == math.inf


def test_recovery_to_zero_equals_final_when_final_is_zero():
    # with an integrator the final value is 0, so both settings give the same time
    a = measure(1 / (s + 1), 4 + 2 / s, ["disturbance_recovery"])["disturbance_recovery"]
    b = measure(1 / (s + 1), 4 + 2 / s, ["disturbance_recovery"],
                recovery_to="zero")["disturbance_recovery"]
    assert np.isfinite(a) and a > 0
    assert_allclose(a, b, rtol=1e-9)


def test_recovery_to_default_left_out_of_complete_settings():
    # the default is not part of the complete settings, so earlier metric keys stay the same
    assert "recovery_to" not in resolve_settings("disturbance_recovery", {})
    assert resolve_settings("disturbance_recovery", {"recovery_to": "zero"})["recovery_to"] == "zero"
    with pytest.raises(SpecError, match="recovery_to"):
        resolve_settings("disturbance_recovery", {"recovery_to": "half"})
