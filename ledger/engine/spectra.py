"""Noise and disturbance spectra of a loop: what drives the rms budgets of :mod:`ledger.engine.rms`.

Three independent sources enter the loop (signals as in :mod:`ledger.engine.loop`):

* ``sensor_noise`` ``n``: added to the measurement (output unit);
* ``input_disturbance`` ``d``: added to the plant input, a force or torque (input unit);
* ``output_disturbance`` ``do``: added to the plant output before the sensor (output unit).

Each is a one-sided power spectral density ``Phi(f)`` in ``unit^2/Hz`` over ``f >= 0`` (Hz),
given either as

* **rational**: ``Phi(f) = q |W(j 2 pi f)|^2``, white noise of one-sided PSD ``q`` (unit^2/Hz;
  an amplitude density of ``a`` unit/sqrt(Hz) is ``q = a^2``) through a stable shaping filter
  ``W`` (``None`` is 1).  In the Lyapunov convention ``E[w(t) w(t+s)] = (q/2) delta(s)``.
  Digital loops read the sources at the sample instants: ``W`` is then in z with the loop's
  sample time and the white sequence has variance ``q / (2 Ts)`` (a flat one-sided PSD ``q``
  up to the Nyquist frequency);
* **table**: rows ``(f_i, Phi_i)`` with ``0 < f_1 < ... < f_n``, interpolated linearly in
  log-log between rows and zero outside the table (a table that starts at 0 Hz: its first
  interval is linear); a digital loop integrates up to the Nyquist frequency.

Pure data and checks here (numpy only); the rms computation is in :mod:`ledger.engine.rms`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import ModelError

__all__ = ["SOURCES", "Spectrum", "psd_at", "parse_psd_table"]

#: The sources, in the order of every table and plot.
SOURCES = ("sensor_noise", "input_disturbance", "output_disturbance")


@dataclass(frozen=True)
class Spectrum:
    """One source's spectrum (see the module note for the definitions).

    Parameters
    ----------
    source : str
        One of :data:`SOURCES`.
    intensity : float
        Rational spectra: one-sided PSD of the white noise, source unit^2/Hz (>= 0).
    shaping : control.LTI or None
        Rational spectra: the shaping filter ``W`` (stable, proper); ``None`` is 1.
    frequencies : tuple of float
        Tabulated spectra: frequencies in Hz, strictly increasing, >= 0.
    psd : tuple of float
        Tabulated spectra: one-sided PSD at those frequencies, source unit^2/Hz (>= 0).
    label : str
        Free text shown in tables (e.g. the file it came from).
    """

    source: str
    intensity: float = 0.0
    shaping: Any = None
    frequencies: tuple = ()
    psd: tuple = ()
    label: str = ""

    def __post_init__(self):
        if self.source not in SOURCES:
            raise ModelError(f"spectrum source {self.source!r} is unknown; use one of "
                             f"{', '.join(SOURCES)}")
        if self.frequencies or self.psd:
            f = np.asarray(self.frequencies, float)
            p = np.asarray(self.psd, float)
            if f.ndim != 1 or f.shape != p.shape or f.size < 2:
                raise ModelError(f"{self.source} table needs at least two rows of "
                                 "(frequency, psd)")
            if not (np.all(np.isfinite(f)) and np.all(np.isfinite(p))):
                raise ModelError(f"{self.source} table holds a value that is not finite")
            if f[0] < 0 or np.any(np.diff(f) <= 0):
                raise ModelError(f"{self.source} table frequencies must be >= 0 and strictly "
                                 "increasing")
            if np.any(p < 0):
                raise ModelError(f"{self.source} table holds a negative PSD")
            if self.shaping is not None or self.intensity:
                raise ModelError(f"{self.source}: give a table or a shaping filter with an "
                                 "intensity, not both")
        else:
            q = float(self.intensity)
            if not (math.isfinite(q) and q >= 0):
                raise ModelError(f"{self.source} intensity {self.intensity!r} must be finite "
                                 "and >= 0 (unit^2/Hz)")

    @property
    def kind(self) -> str:
        """``"table"`` or ``"rational"``."""
        return "table" if self.frequencies else "rational"

    def canonical(self) -> dict:
        """What the spectrum's values depend on, for hashing (the label is left out)."""
        if self.kind == "table":
            return {"source": self.source, "table": [[format(float(a), ".15e"),
                                                      format(float(b), ".15e")]
                                                     for a, b in zip(self.frequencies, self.psd)]}
        from .results import _canon

        return {"source": self.source, "intensity": format(float(self.intensity), ".15e"),
                "shaping": None if self.shaping is None else _canon(self.shaping)}


def psd_at(spec: Spectrum, f: np.ndarray) -> np.ndarray:
    """A tabulated spectrum at frequencies ``f`` (Hz): log-log interpolation between rows
    (linear in the first interval when the table starts at 0 Hz), 0 outside the table."""
    f = np.asarray(f, float)
    F = np.asarray(spec.frequencies, float)
    P = np.asarray(spec.psd, float)
    out = np.zeros_like(f)
    inside = (f >= F[0]) & (f <= F[-1])
    if not inside.any():
        return out
    x = f[inside]
    k = np.clip(np.searchsorted(F, x, side="right") - 1, 0, F.size - 2)
    f0, f1, p0, p1 = F[k], F[k + 1], P[k], P[k + 1]
    vals = np.empty(x.size)
    lin = (f0 <= 0) | (p0 <= 0) | (p1 <= 0)
    vals[lin] = p0[lin] + (p1[lin] - p0[lin]) * (x[lin] - f0[lin]) / (f1[lin] - f0[lin])
    g = ~lin
    t = np.log(x[g] / f0[g]) / np.log(f1[g] / f0[g])
    vals[g] = p0[g] * (p1[g] / p0[g]) ** t
    out[inside] = vals
    return out


def parse_psd_table(text: str, where: str = "spectrum file") -> tuple[tuple, tuple]:
    """Rows ``frequency, psd`` of a text table (comma, semicolon, tab or space separated;
    ``#`` starts a comment; a first line that is not numbers is a header).

    Returns
    -------
    (frequencies, psd) : tuples of float, as written (units are the caller's)

    Raises
    ------
    ModelError
        One line naming the first bad row: not two numbers, not finite, a negative value,
        frequencies not strictly increasing, fewer than two rows.
    """
    fs: list = []
    ps: list = []
    first_data = True
    last_row = 0
    for n, raw in enumerate(text.splitlines(), start=1):
        line = raw.split("#", 1)[0].strip()
        if not line:
            continue
        parts = [p for p in line.replace(",", " ").replace(";", " ").replace("\t", " ")
                 .split(" ") if p]
        try:
            vals = [float(p) for p in parts]
        except ValueError as e:
            if first_data and not fs:
                first_data = False
                continue  # a header line
            raise ModelError(f"{where} row {n}: {line!r} is not two numbers "
                             "(frequency, psd)") from e
        first_data = False
        if len(vals) != 2:
            raise ModelError(f"{where} row {n}: expected two columns (frequency, psd), "
                             f"got {len(vals)}")
        f, p = vals
        if not (math.isfinite(f) and math.isfinite(p)):
            raise ModelError(f"{where} row {n}: value is not finite")
        if f < 0 or p < 0:
            raise ModelError(f"{where} row {n}: negative {'frequency' if f < 0 else 'psd'} "
                             f"{f if f < 0 else p!r}")
        if fs and f <= fs[-1]:
            raise ModelError(f"{where} row {n}: frequency {f!r} does not increase "
                             f"(row {last_row} has {fs[-1]!r})")
        fs.append(f)
        ps.append(p)
        last_row = n
    if len(fs) < 2:
        raise ModelError(f"{where}: needs at least two rows of (frequency, psd), "
                         f"found {len(fs)}")
    return tuple(fs), tuple(ps)
