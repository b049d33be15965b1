"""Frequency metrics of a loop closed round a measured plant (``docs/measured.md``).

The loop gain is ``L(jw) = C(jw) H(jw) G(jw) e^{-jw tau}`` with the loop's controller C,
sensor H and total delay tau evaluated exactly, and the measured plant G interpolated between
the kept points (coherence at least the measurement's threshold): linear in log frequency for
log magnitude and for unwrapped phase.  Crossings are refined on that interpolant with Brent's
method, peaks with a bounded scalar minimiser round the best point of a dense grid
(:data:`SUBDIVIDE` points per measured interval).

Nothing outside the measured band is guessed: a crossing or a peak that the data do not
enclose is an error naming the band.  Stability uses the Nyquist criterion with the declared
open-loop right-half-plane poles and integrators (see :func:`nyquist_unstable`).
"""

from __future__ import annotations

import math

import numpy as np
from scipy.optimize import brentq, minimize_scalar

from ..errors import ModelError
from ..systems.measured import MeasuredResponse

__all__ = ["MeasuredLoop", "MEASURED_METRICS", "measured_metric", "SUBDIVIDE",
           "NeedsModelError"]

#: dense-grid points per measured interval (peaks and brackets; crossings are then refined)
SUBDIVIDE = 32

#: metrics a measured member supports
MEASURED_METRICS = ("stable", "gain_margin", "gain_margin_lower", "phase_margin",
                    "delay_margin", "gain_crossover", "phase_crossover", "bandwidth",
                    "peak_sensitivity", "peak_complementary_sensitivity",
                    "peak_control_sensitivity", "sensitivity_below",
                    "complementary_sensitivity_above", "disk_margin", "disk_gain_margin",
                    "disk_phase_margin")


class NeedsModelError(ModelError):
    """A metric a frequency response cannot give (time responses, poles, limits at s = 0)."""


def _count_poles(sys) -> tuple[int, int]:
    """(poles at s = 0, poles in the open right half plane) of a continuous block."""
    if sys is None or isinstance(sys, (int, float)):
        return 0, 0
    import control

    p = np.atleast_1d(control.poles(sys))
    scale = max(1.0, float(np.max(np.abs(p)))) if p.size else 1.0
    zero = np.abs(p) <= 1e-9 * scale
    return int(zero.sum()), int(np.sum((p.real > 0) & ~zero))


def _eval(sys, s):
    s = np.asarray(s, dtype=complex)
    if sys is None:
        return np.ones_like(s)
    if isinstance(sys, (int, float)):
        return np.full_like(s, float(sys))
    return np.asarray(sys(s), dtype=complex).reshape(s.shape)


class MeasuredLoop:
    """The loop gain of one measured member on its interpolant.

    Parameters
    ----------
    meas : MeasuredResponse
    controller : control.LTI or float
        Continuous-time controller.
    loop : LoopSpec
    plant_delay : float
        The variant's own delay, s.
    """

    def __init__(self, meas: MeasuredResponse, controller, loop, plant_delay: float = 0.0):
        if loop.sample_time is not None:
            raise ModelError("a measured plant in a digital loop (sample_time set) is not "
                             "supported: the sampled plant needs the response above the "
                             "Nyquist frequency")
        for blk, what in ((controller, "controller"), (loop.sensor, "sensor")):
            if blk is not None and not isinstance(blk, (int, float)) and blk.dt not in (0, None):
                raise ModelError(f"the {what} is discrete; a measured plant needs a "
                                 f"continuous loop")
        self.meas = meas
        self.C, self.H = controller, loop.sensor
        self.tau = float(loop.input_delay) + float(loop.output_delay) + float(plant_delay)
        keep = meas.used
        self.w = meas.omega[keep]
        self.x = np.log(self.w)
        g = meas.response[keep]
        self.lmag = np.log(np.abs(g))
        self.phase = np.unwrap(np.angle(g))
        qc, pc = _count_poles(controller)
        qh, ph = _count_poles(loop.sensor)
        self.integrators = meas.integrators + qc + qh
        self.rhp = meas.rhp_poles + pc + ph
        n = self.x.size
        t = np.linspace(0.0, 1.0, SUBDIVIDE + 1)[:-1]
        dense = (self.x[:-1, None] + np.diff(self.x)[:, None] * t).ravel()
        self.xd = np.append(dense, self.x[-1])
        self.Ld = self.L(self.xd)
        self.excluded = meas.excluded
        self.n = n

    # ------------------------------------------------------------------ interpolant
    @property
    def band(self) -> str:
        return f"{self.w[0]:.4g}..{self.w[-1]:.4g} rad/s"

    def G(self, x):
        """Interpolated plant response at log frequencies ``x`` (inside the band)."""
        x = np.asarray(x, float)
        m = np.interp(x, self.x, self.lmag)
        p = np.interp(x, self.x, self.phase)
        return np.exp(m + 1j * p)

    def _parts(self, x):
        w = np.exp(np.asarray(x, float))
        s = np.asarray(1j * w, dtype=complex)
        C = _eval(self.C, s)
        H = _eval(self.H, s)
        return C, H, self.G(x) * np.exp(-s * self.tau)

    def L(self, x):
        C, H, Gd = self._parts(x)
        return C * H * Gd

    def closed(self, which: str, x):
        C, H, Gd = self._parts(x)
        L = C * H * Gd
        S = 1.0 / (1.0 + L)
        if which == "S":
            return S
        if which == "T":
            return L * S
        if which == "CS":
            return C * S
        if which == "S-T":
            return S - L * S
        raise ValueError(which)

    def outside(self, what: str) -> ModelError:
        return ModelError(f"outside measured band: {what} (data cover {self.band})")

    # ------------------------------------------------------------------ stability
    def nyquist_unstable(self) -> int:
        """Closed-loop right-half-plane poles by the Nyquist criterion.

        ``Z = P + q/2 - D/pi`` with P the declared open-loop RHP poles (plant, plus those of
        controller and sensor), q the integrators of the loop and D the change of
        ``arg(1 + L(jw))`` from ``w = 0+`` to infinity (contour indented to the right round
        s = 0).  The data give D inside the band; the ends need two stated assumptions, else
        an "outside measured band" error: above the band |L| stays below 1 (checked: |L| < 1
        at the top point), and below it L follows its integrators, ``L ~ K/(jw)^q`` with K
        real (checked: arg(1 + L) at the lowest point within 45 degrees of that asymptote).
        """
        F = 1.0 + self.Ld
        a = np.unwrap(np.angle(F))
        if np.max(np.abs(np.diff(a))) > math.pi / 3:
            raise ModelError("the loop gain passes too close to -1 between measured points "
                             "to count encirclements")
        q = self.integrators
        lattice = -q * math.pi / 2
        k = round((a[0] - lattice) / math.pi)
        a0 = lattice + k * math.pi
        if abs(a[0] - a0) > math.pi / 4:
            raise self.outside(f"the loop gain at {self.w[0]:.4g} rad/s is not yet on its "
                               f"low-frequency asymptote ({q} integrator(s)); measure lower "
                               f"or declare the integrators")
        if abs(self.Ld[-1]) >= 1.0:
            raise self.outside(f"|L| is {abs(self.Ld[-1]):.3g} at the top of the band; "
                               f"the loop gain must have fallen below 1")
        top = float(np.angle(F[-1]))
        D = (a[-1] - a0) + (0.0 - top)
        z = self.rhp + q / 2 - D / math.pi
        if abs(z - round(z)) > 0.25:
            raise ModelError(f"the Nyquist count {z:.2f} is not a whole number; the data "
                             f"are not consistent with the declared poles")
        return int(round(z))

    # ------------------------------------------------------------------ crossings
    def gain_crossovers(self) -> np.ndarray:
        f = np.log(np.abs(self.Ld))
        idx = np.flatnonzero(np.sign(f[:-1]) * np.sign(f[1:]) <= 0)
        out = []
        fun = lambda x: float(np.log(np.abs(self.L(x))))  # noqa: E731
        for i in idx:
            if f[i] == 0:
                out.append(self.xd[i])
            elif f[i + 1] != 0:
                out.append(brentq(fun, self.xd[i], self.xd[i + 1], xtol=1e-14))
        return np.exp(np.unique(out)) if out else np.zeros(0)

    def phase_crossovers(self) -> np.ndarray:
        ph = np.unwrap(np.angle(self.Ld))
        turns = np.floor((ph + math.pi) / (2 * math.pi))
        idx = np.flatnonzero(np.diff(turns) != 0)
        out = []
        fun = lambda x: float(np.imag(self.L(x)))  # noqa: E731
        for i in idx:
            a, b = self.xd[i], self.xd[i + 1]
            fa, fb = fun(a), fun(b)
            if fa == 0:
                out.append(a)
            elif fa * fb < 0:
                out.append(brentq(fun, a, b, xtol=1e-14))
            else:
                out.append(b)
        return np.exp(np.unique(out)) if out else np.zeros(0)

    # ------------------------------------------------------------------ peaks
    def peak(self, which: str, lo: float = 0.0, hi: float = math.inf, *,
             what: str = "the peak") -> float:
        """max |which(jw)| over [lo, hi] within the band; an edge of the band that holds the
        maximum is an error (the peak may lie outside the data)."""
        xl = self.x[0] if lo <= self.w[0] else math.log(lo)
        xh = self.x[-1] if hi >= self.w[-1] else math.log(hi)
        if lo > self.w[-1] or hi < self.w[0] or xl >= xh:
            raise self.outside(f"the range {lo:g}..{hi:g} rad/s has no measured point")
        inner = self.xd[(self.xd > xl) & (self.xd < xh)]
        xs = np.concatenate([[xl], inner, [xh]])
        v = np.abs(self.closed(which, xs))
        i = int(np.argmax(v))
        if (i == 0 and lo <= self.w[0]) or (i == xs.size - 1 and hi >= self.w[-1]):
            raise self.outside(f"{what} sits at the band edge {math.exp(xs[i]):.4g} rad/s "
                               f"and may lie beyond it")
        a, b = xs[max(i - 1, 0)], xs[min(i + 1, xs.size - 1)]
        r = minimize_scalar(lambda x: -float(np.abs(self.closed(which, x))), bounds=(a, b),
                            method="bounded", options={"xatol": 1e-12})
        return max(float(v[i]), -float(r.fun))


def _margins(ml: MeasuredLoop):
    pc = ml.phase_crossovers()
    gc = ml.gain_crossovers()
    return pc, gc


def measured_metric(ml: MeasuredLoop, name: str, settings: dict, stable: bool) -> float:
    """One metric on a measured member; raises with the reason when it cannot be given."""
    if name not in MEASURED_METRICS:
        raise NeedsModelError(f"{name} needs a model: a measured member has only a "
                              f"frequency response (no poles, no time response)")
    if name in ("peak_sensitivity", "peak_complementary_sensitivity",
                "peak_control_sensitivity", "sensitivity_below",
                "complementary_sensitivity_above", "disk_margin", "disk_gain_margin",
                "disk_phase_margin", "bandwidth") and not stable:
        from ..errors import UnstableLoopError
        raise UnstableLoopError(f"{name} needs a stable closed loop; the Nyquist criterion "
                                f"on the measured data says it is unstable")
    if name in ("gain_margin", "gain_margin_lower", "phase_crossover"):
        pc = ml.phase_crossovers()
        if pc.size == 0:
            raise ml.outside("no phase crossover inside the data; the gain margin lies "
                             "outside them")
        gm = -20 * np.log10(np.abs(ml.L(np.log(pc))))
        if name == "gain_margin_lower":
            neg = gm[gm < 0]
            return float(neg.max()) if neg.size else -math.inf
        pos = gm > 0
        if not pos.any():
            return math.inf if name == "gain_margin" else math.inf
        k = np.flatnonzero(pos)[int(np.argmin(gm[pos]))]
        return float(gm[k]) if name == "gain_margin" else float(pc[k])
    if name in ("phase_margin", "delay_margin", "gain_crossover"):
        gc = ml.gain_crossovers()
        if gc.size == 0:
            raise ml.outside("no gain crossover inside the data")
        ph = np.angle(ml.L(np.log(gc)), deg=True)
        pm = (180.0 + ph + 180.0) % 360.0 - 180.0  # wrapped to [-180, 180)
        pm = np.where(pm == -180.0, 180.0, pm)
        if name == "delay_margin":
            if not stable:
                return 0.0
            return float(np.min(np.radians((180.0 + ph) % 360.0) / gc))
        k = int(np.argmin(pm))
        return float(pm[k]) if name == "phase_margin" else float(gc[k])
    if name == "peak_sensitivity":
        return ml.peak("S", what="the peak of |S|")
    if name == "peak_complementary_sensitivity":
        return ml.peak("T", what="the peak of |T|")
    if name == "peak_control_sensitivity":
        return ml.peak("CS", what="the peak of |CS|")
    if name == "sensitivity_below":
        f = settings["frequency"]
        if f > ml.w[-1]:
            raise ml.outside(f"the bound {f:g} rad/s is above the data")
        return ml.peak("S", 0.0, f, what="the largest |S| below the bound")
    if name == "complementary_sensitivity_above":
        f = settings["frequency"]
        if f < ml.w[0]:
            raise ml.outside(f"the bound {f:g} rad/s is below the data")
        return ml.peak("T", f, math.inf, what="the largest |T| above the bound")
    if name in ("disk_margin", "disk_gain_margin", "disk_phase_margin"):
        a = 2.0 / ml.peak("S-T", what="the peak of |S - T|")
        if name == "disk_margin":
            return a
        if name == "disk_gain_margin":
            return 20 * math.log10((2 + a) / (2 - a)) if a < 2 else math.inf
        return math.degrees(2 * math.atan(a / 2))
    if name == "bandwidth":
        if ml.integrators < 1:
            raise ml.outside("|T(0)| is not known from data without an integrator in the "
                             "loop; the bandwidth needs it")
        level = 10 ** (-3 / 20)
        t = np.abs(ml.closed("T", ml.xd)) - level
        if t[0] < 0:
            raise ml.outside("|T| is already below -3 dB at the lowest point")
        idx = np.flatnonzero(t < 0)
        if idx.size == 0:
            raise ml.outside("|T| stays above -3 dB over the whole band")
        i = idx[0] - 1
        fun = lambda x: float(np.abs(ml.closed("T", x))) - level  # noqa: E731
        return float(math.exp(brentq(fun, ml.xd[i], ml.xd[i + 1], xtol=1e-14)))
    raise NeedsModelError(f"{name} needs a model")  # pragma: no cover (listed above)
