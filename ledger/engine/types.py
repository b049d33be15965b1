"""Shared data types of the numeric engine.

These are the contracts between the loop assembly (``engine/loop.py``), the time-domain
kernels (``engine/timeresp.py``), the frequency-domain kernels (``engine/freqresp.py`` and the
modules it gathers) and the plant-family builder (``systems/family.py``).  Nothing here imports SQLAlchemy or Textual.

Conventions
-----------
* ``V`` is the variant axis (one entry per plant variant of a family), always axis 0.
* Continuous time when ``dt is None``; discrete with sample time ``dt`` (seconds) otherwise.
* Frequencies are in rad/s; times in seconds; SISO only.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np

__all__ = ["Variant", "PlantFamily", "SSBatch", "FreqBatch"]

VARIANT_KINDS = ("nominal", "corner", "sample", "fidelity", "measured")


@dataclass(frozen=True)
class Variant:
    """One member of a plant family.

    Parameters
    ----------
    name : str
        Short unique label, e.g. ``"nominal"``, ``"corner:J+,b-"``, ``"sample:017"``,
        ``"fidelity:full-order"``.
    kind : str
        One of ``nominal``, ``corner``, ``sample``, ``fidelity``, ``measured``.
    system : control.LTI
        A SISO python-control ``TransferFunction`` or ``StateSpace``.
    params : dict
        Parameter values that produced this variant (empty for non-parametric ones).
    delay : float
        Plant input (transport) delay in seconds that belongs to this variant, >= 0.
    """

    name: str
    kind: str
    system: Any
    params: dict = field(default_factory=dict)
    delay: float = 0.0


@dataclass(frozen=True)
class PlantFamily:
    """A nominal plant plus its tolerance corners, Monte Carlo samples and fidelity models.

    ``variants[0]`` is always the nominal design model.
    """

    variants: tuple[Variant, ...]

    def __post_init__(self):
        if not self.variants:
            raise ValueError("a plant family needs at least one variant")
        names = [v.name for v in self.variants]
        if len(set(names)) != len(names):
            raise ValueError("variant names in a family must be unique")

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(v.name for v in self.variants)

    def __len__(self) -> int:
        return len(self.variants)

    @classmethod
    def single(cls, system, name: str = "nominal", delay: float = 0.0) -> "PlantFamily":
        return cls((Variant(name=name, kind="nominal", system=system, delay=delay),))


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

    @property
    def nvar(self) -> int:
        return self.A.shape[0]

    @property
    def nstate(self) -> int:
        return self.A.shape[1]


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
