"""Family figures of the HTML evidence, drawn from :mod:`ledger.loopviews` with matplotlib
(Agg, no pyplot state):

* the Nyquist plot of the loop gain with every member drawn (model members as lines,
  measured members at their measured points, the points left out for low coherence as
  hollow markers), the highlighted member (the entry's worst variant, or the one with the
  smallest disk margin) in its own colour, the critical point -1, the highlighted member's
  Ms circle and the exclusion disk of its disk margin, frequency labels along it (crossover,
  resonant peaks, decades) and the crossover and resonance labels of the nominal and the
  measured members;
* the Nichols chart (open-loop phase in deg against gain in dB) of the same members with
  closed-loop M-contours;
* the measured members added to the Bode plot of the loop gain and to the |S|, |T| and
  |S - T| plots;
* for ``model_fit`` entries, the plant's Bode plot: the design model against every
  measurement, the comparison band marked.

Nothing is judged here: the values shown are the engine's (Ms, disk margin) and the ledger's.
"""

from __future__ import annotations

import math

import numpy as np

from ..text import printable
from .figstyle import _aligned_phase, _finish
from ..loopviews import (M_CONTOURS_DB, disk_region, frequency_marks, m_contour,
                         ms_circle, nichols_phase, align_points)

__all__ = ["family_figure", "draw_nyquist", "draw_nichols", "overlay_measured",
           "overlay_closed", "draw_fit", "MEMBER_STYLE"]

#: colours of the family figures: other members, measured members, the highlighted one,
#: the nominal, the critical point, the Ms circle, the disk, the M-contours
MEMBER_STYLE = {"other": "#9ca3af", "measured": "#0f766e", "highlight": "#c2410c",
                "nominal": "#1f5fa8", "critical": "#111111", "ms": "#7c3aed",
                "disk": "#f59e0b", "contour": "#94a3b8", "excluded": "#b91c1c"}

#: Nyquist view: |L| beyond this is outside the frame (the interesting part is near -1)
WINDOW = 4.0


def _style(m, highlight: str):
    if m.name == highlight:
        return MEMBER_STYLE["highlight"], 2.0, 5
    if m.kind == "nominal":
        return MEMBER_STYLE["nominal"], 1.5, 4
    if m.measured:
        return MEMBER_STYLE["measured"], 1.2, 3
    return MEMBER_STYLE["other"], 0.7, 1


def _label(m, highlight: str) -> str | None:
    if m.name == highlight:
        return f"highlighted: {m.name}" + (" (nominal)" if m.kind == "nominal" else "")
    if m.kind == "nominal":
        return "nominal"
    if m.measured:
        return f"{m.name} (measured points)"
    return None


def _thin_idx(n: int, keep: int = 400) -> np.ndarray:
    return np.arange(n) if n <= keep else np.unique(np.linspace(0, n - 1, keep).round()
                                                    .astype(int))


def _order(views, highlight):
    """Members in drawing order: others first, the highlighted one last (on top)."""
    ms = list(views.members)
    return sorted(ms, key=lambda m: (m.name == highlight, m.kind == "nominal" or m.measured))


def _others_note(ax, views) -> None:
    n_other = sum(1 for m in views.members if m.kind not in ("nominal",) and not m.measured)
    if n_other:
        ax.plot([], [], color=MEMBER_STYLE["other"], lw=0.7,
                label=f"{n_other} other model member(s)")
    if views.total > len(views.members) + len(views.skipped):
        ax.plot([], [], " ", label=f"{len(views.members)} of {views.total} members drawn")
    for s in views.skipped[:2]:
        ax.plot([], [], " ", label=f"not drawn: {s[:70]}")


def _side_marks(m, highlight: str, hz: bool, window):
    """Crossover and resonance labels of the nominal and measured members (the highlighted
    one gets every label): which mode is which on each of those curves."""
    if m.name == highlight or not (m.kind == "nominal" or m.measured):
        return []
    return [(j, t) for j, t in frequency_marks(m.w, m.L, hz=hz, window=window)
            if not t[0].isdigit()]


def draw_nyquist(ax, views, highlight: str, *, hz: bool = True) -> None:
    """The Nyquist plot of ``views`` on ``ax`` (see the module docstring)."""
    mark = None
    for m in _order(views, highlight):
        col, lw, z = _style(m, highlight)
        L = m.L
        if m.measured:
            ax.plot(L.real, L.imag, "-", color=col, lw=lw * 0.6, alpha=0.8, zorder=z)
            ax.plot(L.real, L.imag, ".", color=col, ms=3.5 if m.name == highlight else 2.5,
                    zorder=z, label=_label(m, highlight))
            if m.L_excluded.size:
                ax.plot(m.L_excluded.real, m.L_excluded.imag, "o", mfc="none",
                        color=MEMBER_STYLE["excluded"], ms=5, mew=1.0, zorder=z + 1)
        else:
            main = m.name == highlight or m.kind == "nominal"
            idx = _thin_idx(L.size, 800 if main else 250)
            keep = idx[np.abs(L[idx]) <= 3 * WINDOW]
            ax.plot(L[keep].real, L[keep].imag, "-", color=col, lw=lw, zorder=z,
                    label=_label(m, highlight))
            if main:  # the mirror image (w < 0) of the curves that matter
                ax.plot(L[keep].real, -L[keep].imag, ":", color=col, lw=lw * 0.5,
                        zorder=z - 1, alpha=0.6)
        if m.name == highlight:
            mark = m
        for j, text in _side_marks(m, highlight, hz, WINDOW):
            ax.annotate(text, (m.L[j].real, m.L[j].imag), textcoords="offset points",
                        xytext=(-4, -9), fontsize=6, color=col, zorder=z)
    if any(m.L_excluded.size for m in views.members):
        ax.plot([], [], "o", mfc="none", color=MEMBER_STYLE["excluded"], ms=5,
                label="measured points left out (low coherence)")
    ax.plot([-1.0], [0.0], "+", color=MEMBER_STYLE["critical"], ms=12, mew=2.0, zorder=9,
            label="critical point -1")
    if mark is not None:
        if math.isfinite(mark.ms) and mark.ms > 0:
            _, r, pts = ms_circle(mark.ms)
            ax.plot(pts.real, pts.imag, "--", color=MEMBER_STYLE["ms"], lw=1.3, zorder=8,
                    label=f"Ms circle: centre -1, radius 1/Ms = {r:.3g} (Ms {mark.ms:.3g})")
        elif mark.note:
            ax.plot([], [], " ", label=f"no Ms circle: {mark.note[:70]}")
        d = disk_region(mark.alpha) if math.isfinite(mark.alpha) else None
        if d is not None:
            c, r, pts = d
            ax.fill(pts.real, pts.imag, color=MEMBER_STYLE["disk"], alpha=0.25, zorder=2,
                    label=f"disk-margin exclusion disk (alpha {mark.alpha:.3g})")
        for j, text in frequency_marks(mark.w, mark.L, hz=hz, window=WINDOW):
            p = mark.L[j]
            ax.plot([p.real], [p.imag], "o", color=MEMBER_STYLE["highlight"], ms=3, zorder=10)
            ax.annotate(text, (p.real, p.imag), textcoords="offset points", xytext=(4, 4),
                        fontsize=7, color="#333333", zorder=10)
    ax.set_xlim(-WINDOW / 2 - 0.5, 1.5)
    ax.set_ylim(-2.0, 1.0)
    ax.set_aspect("equal", adjustable="box")
    ax.axhline(0.0, color="#cccccc", lw=0.6, zorder=0)
    ax.axvline(0.0, color="#cccccc", lw=0.6, zorder=0)
    ax.set_xlabel("Re L(jw)")
    ax.set_ylabel("Im L(jw)")
    ax.set_title("Nyquist: loop gain of every member (w < 0 dotted for the nominal and the "
                 "highlighted one)", fontsize=10)
    ax.grid(True, alpha=0.3)


def draw_nichols(ax, views, highlight: str, *, hz: bool = True) -> None:
    """The Nichols chart of ``views`` on ``ax`` with M-contours."""
    lo, hi = [], []
    mark = None
    for m in _order(views, highlight):
        col, lw, z = _style(m, highlight)
        ph = nichols_phase(m.L)
        db = 20.0 * np.log10(np.maximum(np.abs(m.L), 1e-300))
        if m.measured:
            ax.plot(ph, db, "-", color=col, lw=lw * 0.6, alpha=0.8, zorder=z)
            ax.plot(ph, db, ".", color=col, ms=2.5, zorder=z, label=_label(m, highlight))
            if m.L_excluded.size:
                ax.plot(align_points(m.w_excluded, m.L_excluded, m.w, ph),
                        20.0 * np.log10(np.abs(m.L_excluded)), "o", mfc="none",
                        color=MEMBER_STYLE["excluded"], ms=5, mew=1.0, zorder=z + 1)
        else:
            idx = _thin_idx(ph.size, 800 if m.name == highlight or m.kind == "nominal" else 250)
            ax.plot(ph[idx], db[idx], "-", color=col, lw=lw, zorder=z, label=_label(m, highlight))
        vis = np.abs(db) <= 40.0
        if vis.any():
            lo.append(float(ph[vis].min()))
            hi.append(float(ph[vis].max()))
        if m.name == highlight:
            mark = (m, ph, db)
        for j, text in _side_marks(m, highlight, hz, None):
            if abs(db[j]) <= 40:
                ax.annotate(text, (ph[j], db[j]), textcoords="offset points", xytext=(-4, -9),
                            fontsize=6, color=col, zorder=z)
    x0 = max(min(lo, default=-360.0), -720.0)
    x1 = min(max(hi, default=0.0), 180.0)
    x0, x1 = 90.0 * math.floor(min(x0, -270.0) / 90.0), 90.0 * math.ceil(max(x1, -90.0) / 90.0)
    first = True
    for m_db in M_CONTOURS_DB:
        cph, cdb = m_contour(m_db, 241)
        for k in range(int(math.floor(x0 / 360.0)), int(math.ceil(x1 / 360.0)) + 1):
            sel = (cph + 360.0 * k >= x0) & (cph + 360.0 * k <= x1) & (np.abs(cdb) <= 40)
            if not sel.any():
                continue
            ax.plot(cph[sel] + 360.0 * k, cdb[sel], "-", color=MEMBER_STYLE["contour"], lw=0.6,
                    zorder=0, label="closed-loop |T| contours (dB)" if first else None)
            first = False
            j = np.flatnonzero(sel)[int(np.argmax(cdb[sel]))]
            ax.annotate(f"{m_db:g} dB", (cph[j] + 360.0 * k, cdb[j]), fontsize=6.5,
                        color="#64748b", xytext=(2, 2), textcoords="offset points")
    for k in range(int(math.floor((x0 + 180) / 360.0)), int(math.ceil((x1 + 180) / 360.0)) + 1):
        x = -180.0 + 360.0 * k
        if x0 <= x <= x1:
            ax.plot([x], [0.0], "+", color=MEMBER_STYLE["critical"], ms=12, mew=2.0, zorder=9,
                    label="critical point (-180 deg, 0 dB)" if k == 0 else None)
    if mark is not None:
        m, ph, db = mark
        for j, text in frequency_marks(m.w, m.L, hz=hz, window=None):
            if abs(db[j]) <= 40 and x0 <= ph[j] <= x1:
                ax.plot([ph[j]], [db[j]], "o", color=MEMBER_STYLE["highlight"], ms=3, zorder=10)
                ax.annotate(text, (ph[j], db[j]), textcoords="offset points", xytext=(4, 4),
                            fontsize=7, color="#333333", zorder=10)
    ax.set_xlim(x0, x1)
    ax.set_ylim(-40.0, 40.0)
    ax.set_xticks(np.arange(x0, x1 + 1, 90.0))
    ax.set_xlabel("open-loop phase (deg)")
    ax.set_ylabel("open-loop gain |L| (dB)")
    ax.set_title("Nichols chart with closed-loop |T| contours")
    ax.grid(True, alpha=0.3)


def family_figure(views, highlight: str | None = None, *, width_in: float = 10.0,
                  height_in: float = 3.8, frequency_unit: str = "Hz"):
    """Nyquist plot above the Nichols chart of one revision's family (a matplotlib
    ``Figure``); ``highlight`` is a member's name (default: the smallest disk margin)."""
    from matplotlib.figure import Figure

    hl = views.highlight(highlight)
    hz = frequency_unit == "Hz"
    fig = Figure(figsize=(width_in, height_in * 2.4))
    ax1, ax2 = fig.add_subplot(211), fig.add_subplot(212)
    draw_nyquist(ax1, views, hl, hz=hz)
    _others_note(ax1, views)
    draw_nichols(ax2, views, hl, hz=hz)
    # stored names with control characters read as \uXXXX (ledger/text.py), no missing glyph
    fig.suptitle(f"{printable(views.loop)}/{printable(views.revision)}: loop gain of the "
                 f"plant family "
                 f"({len(views.members)} members drawn)", fontsize=10)
    _finish(fig, fig.axes)
    fig.subplots_adjust(top=0.93, bottom=0.06, hspace=0.3)
    return fig


def overlay_measured(axm, axp, views, worst: str) -> None:
    """Add the measured members of ``views`` to a Bode plot of L (axes in rad/s): kept
    points joined, points left out for low coherence as hollow markers."""
    first = True
    for m in views.members:
        if not m.measured:
            continue
        col = MEMBER_STYLE["highlight"] if m.name == worst else MEMBER_STYLE["measured"]
        lab = (f"worst variant: {m.name}" if m.name == worst else m.name)
        db = 20.0 * np.log10(np.abs(m.L))
        wgc = float("nan")
        cross = np.flatnonzero(np.sign(db[:-1]) * np.sign(db[1:]) < 0)
        ph = np.degrees(np.unwrap(np.angle(m.L)))
        if cross.size:
            wgc = float(m.w[cross[0]])
            pm = 180.0 + float(np.interp(wgc, m.w, ph))
            pm = (pm + 180.0) % 360.0 - 180.0
            ph = _aligned_phase(m.L, m.w, wgc, pm)
        axm.semilogx(m.w, db, ".-", color=col, lw=0.8, ms=2.5, label=f"|L| {lab} (measured)")
        axp.semilogx(m.w, ph, ".-", color=col, lw=0.8, ms=2.5, label=f"{lab} (measured)")
        if m.w_excluded.size:
            lab_x = "measured points left out (low coherence)" if first else None
            axm.semilogx(m.w_excluded, 20.0 * np.log10(np.abs(m.L_excluded)), "o", mfc="none",
                         color=MEMBER_STYLE["excluded"], ms=5, label=lab_x)
            axp.semilogx(m.w_excluded, align_points(m.w_excluded, m.L_excluded, m.w, ph), "o",
                         mfc="none", color=MEMBER_STYLE["excluded"], ms=5)
            first = False


def overlay_closed(ax, views, worst: str, keys) -> None:
    """Add the measured members' |S|, |T| or |S - T| (``keys``) to a magnitude plot (axes in
    rad/s) at their measured points, low-coherence points as hollow markers; |CS| is not
    drawn for them (the loop gain at a measured point does not separate C from H)."""
    first = True
    for m in views.members:
        if not m.measured:
            continue
        col = MEMBER_STYLE["highlight"] if m.name == worst else MEMBER_STYLE["measured"]
        lab = f"worst variant: {m.name}" if m.name == worst else m.name
        for k in keys:
            if k == "CS":
                continue
            for w, L, excluded in ((m.w, m.L, False), (m.w_excluded, m.L_excluded, True)):
                if not w.size:
                    continue
                S = 1.0 / (1.0 + L)
                y = np.abs({"S": S, "T": L * S, "S-T": S - L * S}[k])
                if excluded:
                    ax.plot(w, y, "o", mfc="none", color=MEMBER_STYLE["excluded"], ms=5,
                            label="measured points left out (low coherence)" if first else None)
                    first = False
                else:
                    name = "|S - T|" if k == "S-T" else f"|{k}|"
                    ax.plot(w, y, ".-", color=col, lw=0.8, ms=2.5,
                            label=f"{name} {lab} (measured)")


def draw_fit(fig, views, req, res, worst: str) -> None:
    """The plant's Bode plot for a ``model_fit`` entry: the nominal model against every
    measured member, the comparison band (up to the requirement's frequency) shaded."""
    axm, axp = fig.add_subplot(211), fig.add_subplot(212)
    nom = views.members[0]
    meas = [m for m in views.members if m.measured]
    if meas:
        lo = min(float(m.w[0]) for m in meas) / 2.0
        hi = max(float(np.concatenate([m.w, m.w_excluded]).max()) for m in meas) * 2.0
    else:
        lo, hi = float(nom.w[0]), float(nom.w[-1])
    sel = (nom.w >= lo) & (nom.w <= hi)
    ph_nom = np.degrees(np.unwrap(np.angle(nom.G[sel])))
    axm.semilogx(nom.w[sel], 20 * np.log10(np.abs(nom.G[sel])), color=MEMBER_STYLE["nominal"],
                 lw=1.6, label="design model (nominal)")
    axp.semilogx(nom.w[sel], ph_nom, color=MEMBER_STYLE["nominal"], lw=1.6,
                 label="design model (nominal)")
    first = True
    for m in meas:
        col = MEMBER_STYLE["highlight"] if m.name == worst else MEMBER_STYLE["measured"]
        lab = f"worst: {m.name}" if m.name == worst else m.name
        ph = align_points(m.w, m.G, nom.w[sel], ph_nom)
        axm.semilogx(m.w, 20 * np.log10(np.abs(m.G)), ".-", color=col, lw=0.8, ms=2.5,
                     label=f"{lab} (measured)")
        axp.semilogx(m.w, ph, ".-", color=col, lw=0.8, ms=2.5, label=f"{lab} (measured)")
        if m.w_excluded.size:
            axm.semilogx(m.w_excluded, 20 * np.log10(np.abs(m.G_excluded)), "o", mfc="none",
                         color=MEMBER_STYLE["excluded"], ms=5,
                         label="points left out (low coherence)" if first else None)
            axp.semilogx(m.w_excluded, align_points(m.w_excluded, m.G_excluded, nom.w[sel],
                                                    ph_nom),
                         "o", mfc="none", color=MEMBER_STYLE["excluded"], ms=5)
            first = False
    f = (req.settings or {}).get("frequency")
    for ax in (axm, axp):
        if f is not None:
            ax.axvline(float(f), color="#7a1f1f", ls="--", lw=1.3,
                       label=f"compared up to {float(f):.4g} rad/s" if ax is axm else None)
        ax.set_xlim(lo, hi)
        ax.set_xlabel("frequency w (rad/s)")
        ax.grid(True, which="both", alpha=0.3)
    if res is not None and res.value is not None and math.isfinite(res.value):
        axm.plot([], [], " ", label=f"largest deviation (ledger) {res.value:.4g} {res.unit}")
    axm.set_ylabel("|G| (dB)")
    axp.set_ylabel("phase of G (deg)")
    axm.set_title("Plant: design model against the measured units")
