"""Plant variants and plant families: the members a requirement is verified on.

A :class:`PlantFamily` is what :func:`ledger.systems.build_family` makes from a plant record
and what the engine measures (``ledger.engine.measure_family``); it lives here, in the
systems layer, so that the dependency runs one way (engine -> systems).  The engine
re-exports both names from ``ledger.engine.types``.  Nothing here imports python-control.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

__all__ = ["Variant", "PlantFamily", "VARIANT_KINDS"]

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
