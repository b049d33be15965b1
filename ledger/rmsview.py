"""The rms budget of a revision as the CLI and the HTML evidence show it: per source its kind,
rms, share of the combined variance and the estimated integration error; per frequency band
the rms each source puts there; the cumulative rms versus frequency.  Recomputed from the
engine for display (:func:`ledger.engine.rms.rms_budget` over the family to find the worst
variant, :func:`ledger.engine.rms.rms_curve` for it); verdicts are never recomputed here."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .errors import UsageError

__all__ = ["RmsView", "rms_view", "OUTPUT_NAMES"]

#: ``output`` argument -> (engine output, words)
OUTPUT_NAMES = {"error": ("y", "output error"), "measured": ("e", "measured error"),
                "effort": ("u", "control effort")}


@dataclass(frozen=True)
class RmsView:
    """Attributes: ``rows`` per source ``(source, kind, label, rms, share, rel_error)``;
    ``bands`` (low, high) Hz; ``band_rms`` per source a tuple of rms per band; ``total_rms``;
    ``frequencies`` Hz and ``cumulative_rms`` per source and ``"all"`` (the combined curve)."""

    loop: str
    revision: str
    output: str
    words: str
    unit: str
    variant: str
    rows: tuple
    bands: tuple
    band_rms: dict
    total_rms: float
    frequencies: np.ndarray
    cumulative_rms: dict


def rms_view(lg, loop: str, label: str | None = None, *, output: str = "error",
             bands=None) -> RmsView:
    """The rms budget of revision ``label`` (default the tip) of ``loop`` for ``output``
    (``"error"``, ``"measured"`` or ``"effort"``), for the variant with the largest combined
    rms.  ``bands``: band edges in Hz (default decades 1, 10, 100, 1000)."""
    from .engine.rms import DEFAULT_BANDS, rms_budget, rms_curve

    if output not in OUTPUT_NAMES:
        raise UsageError(f"output {output!r} is unknown; use {', '.join(OUTPUT_NAMES)}")
    edges = tuple(DEFAULT_BANDS if bands is None else bands)
    if any(not (math.isfinite(b) and b > 0) for b in edges) or list(edges) != sorted(set(edges)):
        raise UsageError("band edges must be positive, increasing frequencies in Hz")
    fam, ctrl, spec = lg.numeric_setup(loop, label)
    if not spec.spectra:
        raise UsageError(f"loop {loop!r} has no spectra; record them with "
                         "'loopledger loop spectrum'")
    eng, words = OUTPUT_NAMES[output]
    budget = rms_budget(fam, ctrl, spec, output=eng)
    j = budget.worst_index()
    curve = rms_curve(fam, ctrl, spec, output=eng, variant=j, bands=edges)
    lp = lg.loop(loop)
    pi = lg.plant(lp.plant)
    unit = (pi.input_unit if eng == "u" else pi.output_unit) or ""
    total = float(budget.variance[j])
    rows = []
    for sb in budget.sources:
        v = float(sb.variance[j])
        rows.append((sb.source, sb.kind, sb.label, math.sqrt(v),
                     v / total if total > 0 and math.isfinite(total) else float("nan"),
                     float(sb.error[j]) / v if v > 0 else 0.0))
    cum = {k: np.sqrt(c) for k, c in curve.cumulative.items()}
    cum["all"] = np.sqrt(np.sum(list(curve.cumulative.values()), axis=0))
    band_rms = {k: tuple(math.sqrt(x) for x in v) for k, v in curve.band_variance.items()}
    rev = label or lp.tip or ""
    return RmsView(loop, rev, eng, words, unit, budget.variants[j], tuple(rows),
                   curve.bands, band_rms, math.sqrt(total), curve.frequencies, cum)
