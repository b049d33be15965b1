"""Exact frequency-domain kernels, one front: grids, crossovers, peaks, bandwidth, margins.

Every function works on a batch of ``V`` SISO responses at once (variant axis 0).  Grids are
evaluated for all variants in one call of the evaluator; crossings and peaks are then refined per
variant by bracketed root finding or golden-section search, vectorised over all brackets of all
variants at once (see ``_Sampler``, ``_vsolve``, ``_vmaximize``), so no reported number is read
off a grid.

Nothing is defined here: this module gathers the public names of the modules below so that
``ledger.engine.freqresp.<name>`` stays one address for every frequency-domain kernel.  Margins,
Nyquist encirclements and disk margins live in :mod:`ledger.engine.margins`, which imports only
the lower modules (never this one), so importing them here makes no cycle.

Conventions: frequencies in rad/s, ``w >= 0``; continuous responses are evaluated at ``s = jw``,
discrete ones at ``z = exp(jw dt)`` for ``0 <= w <= pi/dt``.

The kernels live in modules by concept and are all reachable from here:
:mod:`~ledger.engine.freqeval` (evaluation helpers, boundary roots, delay estimate),
:mod:`~ledger.engine.freqsolve` (pairwise evaluation, vectorised root finding and maximisation),
:mod:`~ledger.engine.freqgrid` (grids), :mod:`~ledger.engine.crossings` (crossovers),
:mod:`~ledger.engine.peaks` (peaks and bandwidth), :mod:`~ledger.engine.margins` (margins).
"""

from __future__ import annotations

from ledger.engine.crossings import (_crossing_setup, _gain_crossings,  # noqa: F401
                                     _phase_crossings_all, _phase_crossovers_from,
                                     _pole_interval_mask, _roots_on_grid, _split_by_variant,
                                     gain_crossovers, loop_pairwise, phase_crossovers)
from ledger.engine.freqeval import (_CACHE, _TINY, _AxisRoot, _axis_roots,  # noqa: F401
                                    _axis_roots_loop, _call, _estimate_delay, _memo, _pad,
                                    _s_equivalent, estimate_delay, set_known_delay)
from ledger.engine.freqgrid import (_extend_ends, _grid, _refine_adaptively,  # noqa: F401
                                    _resonance_windows, _thin, frequency_grid)
from ledger.engine.freqsolve import _Sampler, _vmaximize, _vsolve  # noqa: F401
from ledger.engine.margins import (DiskMargin, Margins, closed_loop_unstable_count,  # noqa: F401
                                   disk_margin, encirclements, margins)
from ledger.engine.peaks import _base_grid, bandwidth, peak_gain  # noqa: F401

__all__ = [
    "frequency_grid",
    "gain_crossovers",
    "phase_crossovers",
    "peak_gain",
    "bandwidth",
    "estimate_delay",
    "set_known_delay",
    "loop_pairwise",
    "Margins",
    "DiskMargin",
    "margins",
    "encirclements",
    "closed_loop_unstable_count",
    "disk_margin",
]
