"""Metric catalogue as the store and CLI see it: names, units, settings.

The single source of truth is the engine's registry (``ledger.engine.metrics``); this module is a
thin, import-light adapter so that requirement records can be validated without running the
engine.
"""

from __future__ import annotations

from typing import Any, Mapping

from .errors import IntegrityViolation

__all__ = ["metric_names", "metric_unit", "metric_def", "check_settings"]


def _registry() -> Mapping[str, Any]:
    from .engine.metrics import METRICS

    return METRICS


def metric_names() -> list[str]:
    return sorted(_registry())


def metric_def(name: str):
    reg = _registry()
    if name not in reg:
        raise IntegrityViolation(
            f"unknown metric {name!r}; known metrics: {', '.join(sorted(reg))}"
        )
    return reg[name]


def metric_unit(name: str) -> str:
    return metric_def(name).unit


def check_settings(name: str, settings: Mapping[str, Any]) -> dict:
    """Validate a requirement's metric settings; return them with defaults left out."""
    from .engine.metrics import resolve_settings

    metric_def(name)
    resolve_settings(name, dict(settings))  # raises SpecError naming the setting
    return dict(settings)
