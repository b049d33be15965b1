"""Plain, frozen views of ledger records, returned by the API (no live ORM objects escape)."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from datetime import datetime
from typing import Any

__all__ = [
    "PlantInfo",
    "LoopInfo",
    "RequirementInfo",
    "RevisionInfo",
    "ResultInfo",
    "LineageNode",
    "to_jsonable",
]


@dataclass(frozen=True)
class PlantInfo:
    name: str
    version: int
    model: str
    canonical: str
    params: dict
    fidelity: dict
    samples: int
    seed: int
    sample_time: float | None
    input_unit: str
    output_unit: str
    description: str
    note: str
    author: str
    content_hash: str
    created_at: datetime
    versions: int = 1


@dataclass(frozen=True)
class LoopInfo:
    name: str
    plant: str
    kind: str
    description: str
    sensor: str
    prefilter: str
    input_delay: float
    output_delay: float
    sample_time: float | None
    computation_delay: int
    actuator_limit: float | None
    created_at: datetime
    revisions: int = 0
    tip: str | None = None


@dataclass(frozen=True)
class RequirementInfo:
    key: str
    version: int
    title: str
    statement: str
    rationale: str
    method: str
    status: str
    metric: str | None
    settings: dict
    comparator: str | None
    limit_value: float | None
    limit_text: str
    unit: str
    parents: tuple[str, ...]
    loops: tuple[str, ...]
    author: str
    note: str
    content_hash: str
    created_at: datetime
    latest_version: int = 1


@dataclass(frozen=True)
class RevisionInfo:
    loop: str
    label: str
    seq: int
    parent: str | None
    author: str
    rationale: str
    controller: str
    content_hash: str
    created_at: datetime
    children: tuple[str, ...] = ()


@dataclass(frozen=True)
class ResultInfo:
    loop: str
    revision: str
    requirement: str
    requirement_version: int
    plant_version: int
    verdict: str
    value: float | None
    unit: str
    limit_text: str
    headroom: float | None
    headroom_fraction: float | None
    worst_variant: str
    pass_fraction: float | None
    variants: int
    reason: str
    engine_version: str
    created_at: datetime
    stale: bool = False


@dataclass(frozen=True)
class LineageNode:
    revision: RevisionInfo
    children: tuple["LineageNode", ...] = field(default_factory=tuple)


def to_jsonable(obj: Any) -> Any:
    """Dataclasses, datetimes and infinities to JSON-friendly values."""
    import math

    if hasattr(obj, "__dataclass_fields__"):
        return {k: to_jsonable(v) for k, v in asdict(obj).items()}
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, datetime):
        return obj.isoformat()
    if isinstance(obj, float) and not math.isfinite(obj):
        return "inf" if obj > 0 else ("-inf" if obj < 0 else None)
    return obj
