"""Shared data types of the numeric engine.

These are the contracts between the loop assembly (``engine/loop.py``), the time-domain
kernels (``engine/timeresp.py``) and the frequency-domain kernels (``engine/freqresp.py`` and the
modules it gathers).  ``Variant`` and ``PlantFamily`` live in the systems layer
(``ledger/systems/variants.py``, used by the plant-family builder) and are re-exported here,
so the engine imports systems and never the other way round.  Nothing here imports SQLAlchemy
or Textual.

Conventions
-----------
* ``V`` is the variant axis (one entry per plant variant of a family), always axis 0.
* Continuous time when ``dt is None``; discrete with sample time ``dt`` (seconds) otherwise.
* Frequencies are in rad/s; times in seconds; SISO only.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from ledger.systems.variants import VARIANT_KINDS, PlantFamily, Variant  # noqa: F401 (public names)

__all__ = ["Variant", "PlantFamily", "SSBatch", "FreqBatch"]


@dataclass(frozen=True, eq=False)
class SSBatch:
    """A batch of V SISO LTI systems with one optional internal delay channel.

    Continuous time (``dt is None``)::

        x'(t) = A x + B u + Bw w
        y(t)  = C x + D u + Dw w          (then shifted: output is y(t - io_delay))
        z(t)  = Cz x + Dz u + Dzw w
        w(t)  = z(t - tau)                (w(t) = 0 for t < tau, zero initial history)

    Discrete time (``dt`` set): the same with ``x[k+1]`` on the left, ``tau == 0`` and
    ``io_delay == 0`` (every delay is absorbed into the state as z^-d).

    With ``tau == 0`` the delay channel is absent and ``Bw, Cz, Dz, Dw, Dzw`` may be zeros.

    Shapes: ``A (V,n,n)``, ``B (V,n)``, ``C (V,n)``, ``D (V,)``, ``Bw (V,n)``, ``Cz (V,n)``,
    ``Dz (V,)``, ``Dw (V,)``, ``Dzw (V,)``; floats.  ``n`` may be 0 (static gain).
    ``grid_rows`` (optional) only tunes the time grid, see below.
    """

    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    D: np.ndarray
    dt: float | None = None
    tau: float = 0.0
    Bw: np.ndarray | None = None
    Cz: np.ndarray | None = None
    Dz: np.ndarray | None = None
    Dw: np.ndarray | None = None
    Dzw: np.ndarray | None = None
    io_delay: float = 0.0
    #: ``(V, k, n + 1)`` rows ``[C | D]`` of the outputs that share this batch's ``A`` and
    #: ``B`` (the r->y, r->e and r->u paths of one loop), or ``None``.  The time grid follows
    #: the residues of these outputs besides its own (the largest of them), so those paths
    #: get one grid and share one propagation; extra rows can only make the grid finer.
    grid_rows: np.ndarray | None = None

    @property
    def nvar(self) -> int:
        return self.A.shape[0]

    @property
    def nstate(self) -> int:
        return self.A.shape[1]

    def take(self, m) -> "SSBatch":
        """The variants selected by ``m`` (mask or indices): every per-variant array field
        indexed, the scalars kept."""
        from dataclasses import fields, replace

        per = {f.name: getattr(self, f.name)[m] for f in fields(self)
               if isinstance(getattr(self, f.name), np.ndarray)}
        return replace(self, **per)


@dataclass(frozen=True, eq=False)
class FreqBatch:
    """Exact frequency-response evaluator of a batch of V SISO loop gains L.

    Parameters
    ----------
    evaluate : callable
        ``evaluate(w) -> complex ndarray (V, len(w))``: L(jw) (continuous) or L(e^{jw dt})
        (discrete), exact, delays included as e^{-jw tau}.  ``w`` in rad/s, 1-D, >= 0.
    dt : float or None
        Sample time; for discrete loops frequencies run up to pi/dt.
    poles : list of complex ndarray
        Open-loop poles of L per variant (continuous: s-plane; discrete: z-plane), delay
        excluded.  Used to build pole-aware grids and to count unstable open-loop poles.
    zeros : list of complex ndarray
        Open-loop zeros of L per variant, same conventions.
    dc : ndarray (V,) of complex
        L at w=0 where finite; ``inf`` where L has a pole at s=0 (z=1).
    """

    evaluate: Callable[[np.ndarray], np.ndarray]
    dt: float | None
    poles: list
    zeros: list
    dc: np.ndarray

    @property
    def nvar(self) -> int:
        return len(self.poles)
