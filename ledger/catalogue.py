"""The metric catalogue as the store and CLI see it: a thin view of ``ledger.engine.metrics``.

The engine's catalogue (``ledger/engine/metrics.py``) is the one home of metric names, units,
settings and the unknown-name error; this module only adds the sorted listing and the unit
look-up the store uses.  Both are data only (no numerics), so requirement records can be
validated without running the engine.  An unknown name raises the catalogue's own
:class:`~ledger.errors.UnknownMetricError` with the catalogue's message.
"""

from __future__ import annotations

from typing import Any, Mapping

from .engine.metrics import get_metric, resolve_settings

__all__ = ["metric_names", "metric_unit", "metric_def", "check_settings"]


def metric_names() -> list[str]:
    """Every metric name, sorted."""
    from .engine.metrics import METRICS

    return sorted(METRICS)


def metric_def(name: str):
    """The :class:`~ledger.engine.metrics.MetricDef` of ``name`` (``get_metric``)."""
    return get_metric(name)


def metric_unit(name: str) -> str:
    return get_metric(name).unit


def check_settings(name: str, settings: Mapping[str, Any]) -> dict:
    """Validate a requirement's metric settings; return them with defaults left out."""
    resolve_settings(name, dict(settings))  # unknown metric or setting: one-line SpecError
    return dict(settings)
