"""Delay margin over every gain crossover (issue 10, item 1).

The delay that first destabilises a stable loop is the minimum over *every* gain crossover
``w_c`` of ``((180 deg + arg L(j w_c)) mod 360 deg)[rad] / w_c``: a delay ``tau`` multiplies L
by ``e^{-j w tau}``, which keeps ``|L|`` and turns the phase, so the Nyquist curve first passes
through -1 at a gain crossover.  Crossovers with a negative phase margin count too; the former
rule (positive phase margins only) overstated the margin on resonant and conditionally stable
loops.

Independent checks, none using the engine's crossovers:

* crossovers found here with scipy's ``brentq`` on ``|L(jw)| - 1`` over python-control's own
  frequency response;
* the exact characteristic equation ``1 + L(j w) e^{-j w tau} = 0`` at the margin;
* closed-loop poles with the delay replaced by python-control's 20th-order Pade approximation
  (``control.pade``), just below and just above the margin (a delay ``tau`` is approximated to
  far better than the 2 % steps used here while ``w tau`` stays well under the order);
* for a digital loop, an integer number of samples of delay as a shift register in state
  space, closed with python-control's ``feedback``.
"""

from __future__ import annotations

import math

import control as ct
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.optimize import brentq

from ledger.engine import freqresp as fr
from ledger.engine import measure
from ledger.engine.types import FreqBatch

s = ct.tf("s")

# a lightly damped mode (10 rad/s, zeta 0.02) crosses 0 dB twice above a 1 rad/s crossover;
# both resonance crossovers have a negative phase margin
RESONANT = 1 / s / (s / 5 + 1) * 100 / (s ** 2 + 2 * 0.02 * 10 * s + 100)
# conditionally stable (type 3 with double lead: stable for this gain, unstable for a tenth of
# it), plus a structural mode at 60 rad/s (zeta 0.005) crossing 0 dB twice
CONDITIONAL = 4 * (s + 1) ** 2 / (s ** 3 * (s / 20 + 1)) * 3600 / (s ** 2 + 2 * 0.005 * 60 * s + 3600)


def _L(G, w):
    """python-control's frequency response of G at s = jw (complex)."""
    return complex(G(1j * w))


def _crossovers(G, w_lo=1e-3, w_hi=1e3, n=200_000):
    """Every w > 0 with |G(jw)| = 1, from sign changes of |G| - 1 on a dense log grid, refined
    by scipy brentq (reference library; independent of the engine's crossover search)."""
    w = np.logspace(math.log10(w_lo), math.log10(w_hi), n)
    g = np.abs(G(1j * w)).ravel() - 1.0
    idx = np.flatnonzero(np.sign(g[:-1]) != np.sign(g[1:]))
    return [brentq(lambda x: abs(_L(G, x)) - 1.0, w[i], w[i + 1], xtol=1e-15, rtol=1e-15)
            for i in idx]


def _max_real_with_pade(G, tau, order=20):
    """Largest real part of the closed-loop poles of G e^{-s tau} under unity feedback, the
    delay by python-control's Pade approximation of the given order (state space, eigvals)."""
    num, den = ct.pade(tau, order)
    cl = ct.feedback(ct.ss(G) * ct.ss(ct.tf(num, den)), 1)
    return float(np.max(np.linalg.eigvals(cl.A).real))


def _reference(G):
    """(new margin, old margin, crossover of the new margin) from the crossovers found here."""
    turns = []
    for wc in _crossovers(G):
        pm = math.pi + np.angle(_L(G, wc))          # 180 deg + arg L, rad
        turns.append((math.fmod(pm + 4 * math.pi, 2 * math.pi) / wc,
                      math.remainder(pm, 2 * math.pi), wc))
    new = min(turns)
    old = min(t for t, p, _ in turns if p > 0)      # the former rule: positive margins only
    return new[0], old, new[2]


@pytest.mark.parametrize("G, n_cross", [(RESONANT, 3), (CONDITIONAL, 3)],
                         ids=["resonant", "conditionally-stable"])
def test_delay_margin_counts_every_crossover(G, n_cross):
    assert len(_crossovers(G)) == n_cross
    ref, old, wc = _reference(G)
    m = measure(G, 1.0, ["delay_margin", "stable", "phase_margin"])
    assert m["stable"] == 1.0
    # crossovers refined to ~1e-15 on both sides: agreement to 1e-9 relative is conditioning
    # of |L| - 1 at a slope of order 1 per decade, far looser than either side's error
    assert_allclose(m["delay_margin"], ref, rtol=1e-9)
    # exact characteristic equation at the margin: 1 + L(j wc) e^{-j wc tau} = 0
    assert abs(1.0 + _L(G, wc) * np.exp(-1j * wc * m["delay_margin"])) < 1e-8
    # stable just below the margin, unstable just above (20th-order Pade, python-control)
    assert _max_real_with_pade(G, 0.98 * m["delay_margin"]) < 0
    assert _max_real_with_pade(G, 1.02 * m["delay_margin"]) > 0
    # the former rule overstated it: a delay a fifth above the true margin, far below the old
    # value, already destabilises the loop
    assert old > 2.5 * ref
    assert _max_real_with_pade(G, 1.2 * ref) > 0


def test_conditionally_stable_loop_is_conditional():
    # closed-loop poles by python-control: stable at the gain used, unstable at a tenth of it
    assert np.max(ct.poles(ct.feedback(CONDITIONAL, 1)).real) < 0
    assert np.max(ct.poles(ct.feedback(0.1 * CONDITIONAL, 1)).real) > 0


def test_digital_delay_margin_in_seconds_against_sample_delays():
    # ZOH loop at dt = 0.02 s; the margin is in seconds (delay_margin / dt samples).  Reference:
    # python-control sample_system (ZOH, state space) in series with k samples of delay as a
    # shift register; k = floor(margin/dt) keeps the loop stable, the next integer does not.
    dt = 0.02
    m = measure(RESONANT, 1.0, ["delay_margin", "stable"], sample_time=dt)
    assert m["stable"] == 1.0
    k = math.floor(m["delay_margin"] / dt)
    Gd = ct.sample_system(ct.ss(RESONANT), dt, "zoh")

    def radius(k):
        A = np.eye(k, k, -1)
        B = np.zeros((k, 1))
        B[0, 0] = 1.0
        C = np.zeros((1, k))
        C[0, -1] = 1.0
        cl = ct.feedback(Gd * ct.ss(A, B, C, 0, dt), 1)
        return float(np.max(np.abs(np.linalg.eigvals(cl.A))))

    assert radius(k) < 1.0 < radius(k + 1)
    # the positive-margin crossover alone (about 1.38 s, 69 samples) would overstate it
    assert k < 30


def test_crossover_exactly_at_minus_180_gives_zero():
    # L = e^{-s pi/2}/s: |L(j1)| = 1, arg L(j1) = -90 - 90 = -180 deg (closed form): the closed
    # loop has poles at +-j already, no extra delay is tolerated
    num, den = [1.0], [1.0, 0.0]

    def evaluate(w):
        w = np.asarray(w, float)
        with np.errstate(divide="ignore", invalid="ignore"):
            return (np.polyval(num, 1j * w) / np.polyval(den, 1j * w)
                    * np.exp(-1j * w * math.pi / 2))[None, :]

    fb = FreqBatch(evaluate=evaluate, dt=None, poles=[np.array([0.0])],
                      zeros=[np.empty(0)], dc=np.array([complex(np.inf)]))
    fr.set_known_delay(fb, math.pi / 2)
    m = fr.margins(fb)
    assert_allclose(m.gain_crossover, [1.0], rtol=1e-12)
    assert m.delay_margin[0] == 0.0


def test_no_crossover_above_zero_frequency_is_infinite():
    # L = 1/(s+1): |L(0)| = 1 and |L(jw)| < 1 for every w > 0, so by the small-gain theorem the
    # loop is stable for every delay (closed form); the w = 0 touch is not a crossover
    m = measure(ct.tf([1.0], [1.0, 1.0]), 1.0, ["delay_margin"])
    assert m["delay_margin"] == math.inf


def test_unstable_loop_has_zero_delay_margin():
    # 10/(s+1)^3 under unity feedback: (s+1)^3 + 10 has two right-half-plane roots (numpy
    # roots); no delay is needed to lose stability, so measure reports 0
    assert np.max(np.roots([1, 3, 3, 11]).real) > 0
    m = measure(ct.tf([10.0], [1, 3, 3, 1]), 1.0, ["delay_margin", "stable"])
    assert m["stable"] == 0.0
    assert m["delay_margin"] == 0.0


def test_existing_loop_delay_is_part_of_the_phase():
    # e^{-s tau}/s with tau = 0.3 s: crossover 1 rad/s, extra delay pi/2 - 0.3 s (closed form);
    # the margin is what can be added on top of the loop's own delay
    m = measure(ct.tf([1.0], [1.0, 0.0]), 1.0, ["delay_margin"], delay=0.3)
    assert_allclose(m["delay_margin"], math.pi / 2 - 0.3, rtol=1e-10)
