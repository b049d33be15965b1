"""Numbers behind the plot view's family panels: the Nyquist plot and Nichols chart of every
member of a revision's plant family and the measured members on the Bode plot, from the one
home of those curves (:func:`ledger.loopviews.loop_views`, which uses the helpers
verification uses and the engine's Ms and disk margin).  Run in a worker; nothing here imports
Textual, and the engine is imported lazily.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["MemberLines", "FamilyPlot", "load_family_plot", "highlight_for"]

#: Nyquist panel: points with |L| beyond this are left out (the part near -1 is what counts)
NYQUIST_WINDOW = 4.0
#: Nichols panel: gains beyond +-this many dB are left out
NICHOLS_DB = 40.0


@dataclass(frozen=True, eq=False)
class MemberLines:
    """One member's curves, thinned for the terminal.

    ``nyquist`` is (Re, Im), ``nichols`` (phase deg, gain dB), ``bode`` (w rad/s, gain dB,
    phase deg); the ``*_excluded`` tuples hold a measurement's low-coherence points the same
    way (empty for models)."""

    name: str
    kind: str
    nyquist: tuple
    nichols: tuple
    bode: tuple
    nyquist_excluded: tuple
    nichols_excluded: tuple
    bode_excluded: tuple

    @property
    def measured(self) -> bool:
        return self.kind == "measured"


@dataclass(frozen=True, eq=False)
class FamilyPlot:
    """The family panels of one revision.

    Attributes
    ----------
    highlight, reason : str
        The member drawn in its own colour and why (worst for a requirement, or smallest
        disk margin).
    members : tuple of MemberLines
        Nominal first, in family order.
    ms, alpha : float
        The highlighted member's peak sensitivity and disk margin (engine values; ``nan``
        when it has none).
    ms_circle, disk : tuple or None
        (Re, Im) of the Ms circle (centre -1, radius 1/Ms) and of the disk-margin exclusion
        disk's boundary.
    contours : tuple of (dB, phase deg, gain dB)
        Closed-loop M-contours for the Nichols chart.
    marks : dict
        Frequency unit (``Hz``, ``rad/s``) -> ((Re, Im, phase, dB, text), ...) along the
        highlighted member.
    total : int
        Members in the family.
    skipped : tuple of str
    """

    highlight: str
    reason: str
    members: tuple
    ms: float
    alpha: float
    ms_circle: tuple | None
    disk: tuple | None
    contours: tuple
    marks: dict
    total: int
    skipped: tuple = ()


def highlight_for(lg, loop: str, label: str, requirement: str | None) -> str | None:
    """The worst variant of ``requirement`` on ``loop/label`` (``None`` when it does not
    apply there or names none)."""
    if not requirement:
        return None
    for r in lg.results(loop, label):
        if r.requirement == requirement and r.worst_variant and r.worst_variant != "*":
            return r.worst_variant
    return None


def _pts(x, y) -> tuple:
    return (np.asarray(x, float).tolist(), np.asarray(y, float).tolist())


def _thin(n: int, keep: int) -> np.ndarray:
    return np.arange(n) if n <= keep else np.unique(np.linspace(0, n - 1, keep).round()
                                                    .astype(int))


def _lines(m, keep: int) -> MemberLines:
    from ..loopviews import align_points, nichols_phase

    ph = nichols_phase(m.L)
    db = 20.0 * np.log10(np.maximum(np.abs(m.L), 1e-300))
    idx = _thin(m.L.size, keep)
    nyq = idx[np.abs(m.L[idx]) <= NYQUIST_WINDOW]
    nic = idx[np.abs(db[idx]) <= NICHOLS_DB]
    exc = m.L_excluded
    ph_x = align_points(m.w_excluded, exc, m.w, ph)
    db_x = 20.0 * np.log10(np.abs(exc)) if exc.size else np.zeros(0)
    return MemberLines(
        m.name, m.kind,
        _pts(m.L[nyq].real, m.L[nyq].imag), _pts(ph[nic], db[nic]),
        (np.asarray(m.w[idx]).tolist(), db[idx].tolist(), ph[idx].tolist()),
        _pts(exc.real, exc.imag), _pts(ph_x, db_x),
        (np.asarray(m.w_excluded).tolist(), db_x.tolist(), ph_x.tolist()))


def load_family_plot(lg, loop: str, label: str, *, requirement: str | None = None
                     ) -> FamilyPlot:
    """The family panels of ``loop/label``; the member highlighted is the worst variant of
    ``requirement`` there, else the member with the smallest disk margin.

    Raises
    ------
    LedgerError
        The revision cannot be rebuilt.
    """
    from ..loopviews import (M_CONTOURS_DB, disk_region, frequency_marks, loop_views,
                             m_contour, ms_circle, nichols_phase)

    worst = highlight_for(lg, loop, label, requirement)
    with np.errstate(all="ignore"):
        views = loop_views(lg, loop, label, wanted=[worst] if worst else ())
    hl = views.highlight(worst)
    reason = (f"worst variant of {requirement}" if hl == worst else
              "smallest disk margin")
    mark = views.member(hl)
    members = tuple(_lines(m, 300 if m.name == hl or m.kind == "nominal" else 120)
                    for m in views.members)
    circle = _pts(*_reim(ms_circle(mark.ms, 91)[2])) \
        if math.isfinite(mark.ms) and mark.ms > 0 else None
    d = disk_region(mark.alpha, 91) if math.isfinite(mark.alpha) else None
    disk = _pts(*_reim(d[2])) if d is not None else None
    contours = tuple((m, *_pts(*m_contour(m, 181))) for m in M_CONTOURS_DB)
    ph = nichols_phase(mark.L)
    db = 20.0 * np.log10(np.maximum(np.abs(mark.L), 1e-300))
    marks = {}
    for unit, hz in (("Hz", True), ("rad/s", False)):
        marks[unit] = tuple((float(mark.L[j].real), float(mark.L[j].imag), float(ph[j]),
                             float(db[j]), text)
                            for j, text in frequency_marks(mark.w, mark.L, hz=hz,
                                                           window=NYQUIST_WINDOW, max_marks=5))
    return FamilyPlot(hl, reason, members, float(mark.ms), float(mark.alpha), circle, disk,
                      contours, marks, views.total, views.skipped)


def _reim(z):
    z = np.asarray(z, complex)
    return z.real, z.imag
