"""Helpers shared by the evidence figures (:mod:`ledger.exports.plots`,
:mod:`ledger.exports.loopplots`, :mod:`ledger.exports.rmsplot`): plain tick labels and legends
beside the axes, and the phase of a loop gain on the branch its phase margin is read on."""

from __future__ import annotations

import math

import numpy as np

__all__ = ["_finish", "_aligned_phase"]


def _finish(fig, axes) -> None:
    """Plain-text tick labels on log axes (no math text) and legends right of the plots."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullLocator

    for ax in axes:
        for axis, scale in ((ax.xaxis, ax.get_xscale()), (ax.yaxis, ax.get_yscale())):
            if scale == "log":
                axis.set_major_locator(LogLocator(base=10.0, numticks=9))
                axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
                axis.set_minor_locator(NullLocator())
        if ax.get_legend_handles_labels()[0]:
            ax.legend(loc="upper left", bbox_to_anchor=(1.02, 1.0), fontsize=8.5,
                      borderaxespad=0.0, frameon=False)
    fig.subplots_adjust(left=0.09, right=0.60, bottom=0.12, top=0.90, hspace=0.35)


def _aligned_phase(L, w, wgc, pm):
    ph = np.degrees(np.unwrap(np.angle(L)))
    if math.isfinite(wgc) and math.isfinite(pm):
        at = float(np.interp(wgc, w, ph))
        ph = ph - 360.0 * round((at - (pm - 180.0)) / 360.0)
    else:
        ph = ph - 360.0 * math.floor((ph[0] + 360.0) / 360.0) if ph[0] > 0 else ph
    return ph
