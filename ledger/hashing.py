"""Canonical JSON and SHA-256 content hashes."""

from __future__ import annotations

import hashlib
import json
import math
from typing import Any

__all__ = ["canonical_json", "sha256_of"]


def _normalise(obj: Any) -> Any:
    if isinstance(obj, float):
        if math.isnan(obj):
            raise ValueError("NaN cannot be hashed")
        if math.isinf(obj):
            return "inf" if obj > 0 else "-inf"
        return float(repr(obj)) if obj != 0 else 0.0
    if isinstance(obj, dict):
        return {str(k): _normalise(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_normalise(v) for v in obj]
    return obj


def canonical_json(obj: Any) -> str:
    """Deterministic JSON: sorted keys, no spaces, -0.0 folded to 0.0, infinities as strings."""
    return json.dumps(_normalise(obj), sort_keys=True, separators=(",", ":"), ensure_ascii=False)


def sha256_of(obj: Any) -> str:
    return hashlib.sha256(canonical_json(obj).encode("utf-8")).hexdigest()
