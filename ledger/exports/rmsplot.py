"""The rms budget in the HTML evidence: the contribution table per source and frequency band
(:func:`rms_table_html`) and the cumulative rms versus frequency (:func:`rms_figure`, SVG by
matplotlib)."""

from __future__ import annotations

import html
import math

import numpy as np

__all__ = ["rms_table_html", "rms_figure", "band_label"]


def band_label(lo: float, hi: float) -> str:
    if math.isinf(hi):
        return f">= {lo:g} Hz"
    return f"{lo:g}-{hi:g} Hz"


def _fmt(x: float, unit: str) -> str:
    return f"{x:.4g} {unit}".strip()


def rms_table_html(view, sigmas: float = 1.0) -> str:
    """Contribution table: one row per source (rms, share of the variance, integration error
    estimate, rms per band) and the combined row; ``sigmas``: the requirement's multiple."""
    e = html.escape
    times = (f" The requirement reads {sigmas:g} x the combined rms: "
             f"{_fmt(sigmas * view.total_rms, view.unit)}.") if sigmas != 1 else ""
    head = ["source", "spectrum", "rms", "share", "est. error"] + \
        [band_label(a, b) for a, b in view.bands]
    out = [f"<p class='meta'>rms budget of the {e(view.words)} on variant "
           f"{e(view.variant)} (largest combined rms); values are 1-sigma rms, sources "
           f"independent, powers add.{e(times)}</p>",
           "<table class='fields'><tr>" + "".join(f"<th>{e(h)}</th>" for h in head) + "</tr>"]
    for src, kind, label, rms, share, rel in view.rows:
        bands = view.band_rms.get(src, ())
        cells = [src.replace("_", " "), f"{kind}{' (' + label + ')' if label else ''}",
                 _fmt(rms, view.unit), f"{100 * share:.1f} %" if share == share else "-",
                 "exact" if kind == "rational" else f"{rel:.1e} rel."] + \
            [_fmt(b, view.unit) for b in bands]
        out.append("<tr>" + "".join(f"<td>{e(c)}</td>" for c in cells) + "</tr>")
    allb = [math.sqrt(sum(view.band_rms[s][k] ** 2 for s in view.band_rms))
            for k in range(len(view.bands))]
    cells = ["combined", "", _fmt(view.total_rms, view.unit), "100 %", ""] + \
        [_fmt(b, view.unit) for b in allb]
    out.append("<tr>" + "".join(f"<th>{e(c)}</th>" for c in cells) + "</tr></table>")
    return "".join(out)


def rms_figure(view, limit: float | None = None) -> str:
    """Cumulative rms versus frequency per source and combined, log frequency axis."""
    from matplotlib.figure import Figure

    from .plots import _finish, _svg

    fig = Figure(figsize=(10.0, 3.8))
    ax = fig.add_subplot(1, 1, 1)
    f = view.frequencies
    pos = f > 0
    for key, c in view.cumulative_rms.items():
        lw, ls = (2.0, "-") if key == "all" else (1.2, "--")
        ax.plot(f[pos], np.asarray(c)[pos], ls, lw=lw,
                label="combined" if key == "all" else key.replace("_", " "))
    if limit is not None and math.isfinite(limit):
        ax.axhline(limit, color="0.3", lw=0.8, ls=":", label="limit")
    ax.set_xscale("log")
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel(f"cumulative rms ({view.unit})" if view.unit else "cumulative rms")
    ax.set_title(f"{view.loop}/{view.revision}: rms of the {view.words} from 0 Hz up to f")
    ax.grid(True, which="both", alpha=0.3)
    _finish(fig, [ax])
    return _svg(fig)


def rms_evidence_html(lg, entry) -> str:
    """The rms section of an evidence entry whose requirement is ``rms_error`` or
    ``rms_effort`` (``""`` for any other metric): the contribution table and the cumulative
    rms figure of the entry's revision, or a one-line note why there is none."""
    from ..errors import LedgerError

    q = entry.requirement
    if q.metric not in ("rms_error", "rms_effort"):
        return ""
    settings = dict(q.settings or {})
    output = "effort" if q.metric == "rms_effort" else (
        "measured" if settings.get("error") == "measured" else "error")
    try:
        view = lg.rms_view(entry.loop, entry.revision.label, output=output)
        with np.errstate(all="ignore"):
            svg = rms_figure(view)
    except LedgerError as e:
        return f"<p class='note'>No rms budget: {html.escape(str(e))}</p>"
    try:
        sigmas = float(settings.get("sigmas", 1.0))
    except (TypeError, ValueError):
        sigmas = 1.0
    return rms_table_html(view, sigmas) + f"<div class='figure'>{svg}</div>"
