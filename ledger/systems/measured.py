"""Measured plants: a frequency response recorded on the bench, as a member of a plant family.

A :class:`MeasuredResponse` holds the frequencies (rad/s, strictly increasing, > 0), the complex
response of the plant at them, an optional coherence per point, what is known about the plant
that the data cannot show (the number of open-loop right-half-plane poles and of integrators,
needed by the Nyquist criterion), and who measured it, when, with what excitation.

It stands where a python-control system stands in a :class:`~ledger.systems.variants.Variant`
of kind ``"measured"``; the engine measures such members with
:mod:`ledger.engine.measured` (frequency metrics only: a frequency response has no poles and
no time response).  Nothing here imports python-control except :func:`from_frd`.
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np

from ledger.errors import ModelError

__all__ = ["MeasuredResponse", "measured_response", "from_frd", "MEASUREMENT_META",
           "DEFAULT_MIN_COHERENCE"]

#: metadata fields a measurement may carry (all text)
MEASUREMENT_META = ("measured_by", "measured_at", "excitation", "note", "source",
                    "source_hash")
#: points whose coherence is below this are left out (common practice for swept-sine and
#: chirp measurements with a signal analyser, no source)
DEFAULT_MIN_COHERENCE = 0.8


def _count(name: str, value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 0 \
            or value > 20:
        raise ModelError(f"{name} must be a whole number between 0 and 20, got {value!r}")
    return int(value)


@dataclass(frozen=True, eq=False)
class MeasuredResponse:
    """A plant's frequency response measured at discrete frequencies.

    Parameters
    ----------
    omega : ndarray (n,)
        Frequencies in rad/s, finite, > 0, strictly increasing; n >= 2.
    response : ndarray (n,) complex
        Plant output over plant input at each frequency (plant units), finite and non-zero.
    coherence : ndarray (n,) or None
        Coherence of each point in [0, 1] (``None``: not recorded, every point is used).
    rhp_poles : int
        Open-loop right-half-plane poles of the plant (not visible in data; default 0).
    integrators : int
        Poles of the plant at s = 0 (default 0).
    min_coherence : float
        Points with coherence below this are excluded (default 0.8).
    meta : dict
        ``measured_by``, ``measured_at``, ``excitation``, ``note``, ``source``,
        ``source_hash`` (text, all optional).
    """

    omega: np.ndarray
    response: np.ndarray
    coherence: np.ndarray | None = None
    rhp_poles: int = 0
    integrators: int = 0
    min_coherence: float = DEFAULT_MIN_COHERENCE
    meta: dict = field(default_factory=dict)

    def __post_init__(self):
        w = np.asarray(self.omega, dtype=float).reshape(-1)
        g = np.asarray(self.response, dtype=complex).reshape(-1)
        if w.size < 2:
            raise ModelError(f"a measurement needs at least 2 points, got {w.size}")
        if g.size != w.size:
            raise ModelError(f"a measurement needs one response value per frequency, got "
                             f"{w.size} frequencies and {g.size} values")
        for i in range(w.size):
            if not math.isfinite(w[i]) or w[i] <= 0:
                raise ModelError(f"point {i + 1}: frequency {w[i]!r} is not finite and > 0")
            if i and w[i] <= w[i - 1]:
                word = "repeats" if w[i] == w[i - 1] else "is below"
                raise ModelError(f"point {i + 1}: frequency {w[i]:g} rad/s {word} the one "
                                 f"before; frequencies must increase strictly")
            if not np.isfinite(g[i]) or g[i] == 0:
                raise ModelError(f"point {i + 1}: response {g[i]!r} is not finite and non-zero")
        c = None
        if self.coherence is not None:
            c = np.asarray(self.coherence, dtype=float).reshape(-1)
            if c.size != w.size:
                raise ModelError(f"a measurement needs one coherence per frequency, got "
                                 f"{c.size} for {w.size} frequencies")
            bad = np.flatnonzero(~(np.isfinite(c) & (c >= 0) & (c <= 1)))
            if bad.size:
                raise ModelError(f"point {bad[0] + 1}: coherence {c[bad[0]]!r} is not "
                                 f"between 0 and 1")
        mc = self.min_coherence
        if isinstance(mc, bool) or not isinstance(mc, (int, float)) or not 0 <= mc < 1:
            raise ModelError(f"min_coherence must be a number in [0, 1), got {mc!r}")
        meta = {}
        for k, v in dict(self.meta or {}).items():
            if k not in MEASUREMENT_META:
                raise ModelError(f"unknown measurement field {k!r}; use "
                                 f"{', '.join(MEASUREMENT_META)}")
            if not isinstance(v, str):
                raise ModelError(f"measurement field {k!r} must be text, got {v!r}")
            meta[k] = v
        w.setflags(write=False)
        g.setflags(write=False)
        if c is not None:
            c.setflags(write=False)
        object.__setattr__(self, "omega", w)
        object.__setattr__(self, "response", g)
        object.__setattr__(self, "coherence", c)
        object.__setattr__(self, "rhp_poles", _count("rhp_poles", self.rhp_poles))
        object.__setattr__(self, "integrators", _count("integrators", self.integrators))
        object.__setattr__(self, "min_coherence", float(mc))
        object.__setattr__(self, "meta", meta)
        used = self.used
        if used.sum() < 2:
            raise ModelError(f"fewer than 2 points have coherence >= {mc:g}; nothing left to "
                             f"verify on")

    # ------------------------------------------------------------------ views
    @property
    def used(self) -> np.ndarray:
        """Boolean mask of the points kept (coherence at least ``min_coherence``)."""
        if self.coherence is None:
            return np.ones(self.omega.size, bool)
        return self.coherence >= self.min_coherence

    @property
    def excluded(self) -> int:
        """Number of points left out for low coherence."""
        return int(self.omega.size - self.used.sum())

    @property
    def band(self) -> tuple[float, float]:
        """(lowest, highest) frequency kept, rad/s."""
        w = self.omega[self.used]
        return float(w[0]), float(w[-1])

    @property
    def dt(self) -> float:
        """0: a measured plant is a continuous-time plant."""
        return 0.0

    # ------------------------------------------------------------------ storage
    def to_json(self) -> dict:
        """JSON-able form (numbers as shortest reprs) that :meth:`from_json` reads back."""
        out = {"omega": [float(x) for x in self.omega],
               "re": [float(x) for x in self.response.real],
               "im": [float(x) for x in self.response.imag],
               "rhp_poles": self.rhp_poles, "integrators": self.integrators,
               "min_coherence": self.min_coherence, "meta": dict(sorted(self.meta.items()))}
        if self.coherence is not None:
            out["coherence"] = [float(x) for x in self.coherence]
        return out

    @classmethod
    def from_json(cls, obj: Mapping) -> "MeasuredResponse":
        try:
            g = np.asarray(obj["re"], float) + 1j * np.asarray(obj["im"], float)
            return cls(omega=np.asarray(obj["omega"], float), response=g,
                       coherence=obj.get("coherence"), rhp_poles=obj.get("rhp_poles", 0),
                       integrators=obj.get("integrators", 0),
                       min_coherence=obj.get("min_coherence", DEFAULT_MIN_COHERENCE),
                       meta=obj.get("meta", {}))
        except (KeyError, TypeError, ValueError) as e:
            raise ModelError(f"a stored measurement is malformed: {e}") from e

    def digest(self) -> str:
        """SHA-256 of the canonical JSON form (the data, the declarations and the metadata)."""
        payload = json.dumps(self.to_json(), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(payload.encode()).hexdigest()

    def __repr__(self) -> str:
        lo, hi = self.band
        return (f"MeasuredResponse({self.omega.size} points, {lo:g}..{hi:g} rad/s, "
                f"{self.excluded} excluded)")


def measured_response(omega, response=None, *, magnitude=None, phase=None,
                      coherence=None, hz: bool = False, db: bool = False, deg: bool = False,
                      rhp_poles: int = 0, integrators: int = 0,
                      min_coherence: float = DEFAULT_MIN_COHERENCE,
                      **meta) -> MeasuredResponse:
    """Build a measurement from numpy arrays.

    Parameters
    ----------
    omega : array_like
        Frequencies, rad/s (Hz with ``hz=True``).
    response : array_like of complex, optional
        Complex response; or give ``magnitude`` and ``phase`` instead.
    magnitude, phase : array_like, optional
        Linear magnitude (dB with ``db=True``) and phase in rad (deg with ``deg=True``).
    coherence : array_like, optional
    rhp_poles, integrators, min_coherence
        See :class:`MeasuredResponse`.
    **meta
        ``measured_by``, ``measured_at``, ``excitation``, ``note``.

    Raises
    ------
    ModelError
        Bad arrays (with the point number), both or neither of the two forms.
    """
    w = np.asarray(omega, dtype=float) * (2 * math.pi if hz else 1.0)
    if (response is None) == (magnitude is None or phase is None):
        raise ModelError("give either the complex response or magnitude and phase")
    if response is None:
        mag = np.asarray(magnitude, dtype=float)
        if db:
            mag = 10.0 ** (mag / 20.0)
        ph = np.asarray(phase, dtype=float) * (math.pi / 180 if deg else 1.0)
        if mag.shape != ph.shape:
            raise ModelError("magnitude and phase must have the same length")
        response = mag * np.exp(1j * ph)
    return MeasuredResponse(omega=w, response=np.asarray(response, complex),
                            coherence=coherence, rhp_poles=rhp_poles, integrators=integrators,
                            min_coherence=min_coherence, meta=meta)


def from_frd(frd, **kwargs) -> MeasuredResponse:
    """A measurement from a SISO python-control ``FrequencyResponseData`` (its ``omega`` in
    rad/s and its complex response); keywords as :func:`measured_response`."""
    import control

    if not isinstance(frd, control.FrequencyResponseData):
        raise ModelError(f"expected a control.FrequencyResponseData, got {type(frd).__name__}")
    if frd.ninputs != 1 or frd.noutputs != 1:
        raise ModelError("a measured plant must be SISO (one input, one output)")
    resp = np.asarray(getattr(frd, "frdata", None) if hasattr(frd, "frdata") else frd.fresp)[0, 0, :]
    return measured_response(np.asarray(frd.omega, float), resp, **kwargs)
