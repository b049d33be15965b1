"""Numeric engine: loop assembly, stability, kernels, metric catalogue and ``measure``.

Importing this package is cheap: python-control is only imported when one of the names
below that needs it is first used (``from ledger.engine import measure`` triggers it).
"""

from __future__ import annotations

import importlib
import sys
import types

__all__ = ["measure", "measure_family", "Measurement", "FamilyResult", "MetricResult",
           "ENGINE_VERSION", "fingerprint", "request_key", "LoopSpec", "Assembly", "assemble",
           "stability", "StabilityReport", "METRICS", "MetricDef", "STANDARD_SUITE",
           "get_metric", "metric_names"]

_WHERE = {
    "measure": "measure", "measure_family": "measure", "Measurement": "measure",
    "FamilyResult": "measure", "MetricResult": "measure", "ENGINE_VERSION": "measure",
    "fingerprint": "measure", "request_key": "measure",
    "LoopSpec": "loop", "Assembly": "loop", "assemble": "loop",
    "stability": "stability", "StabilityReport": "stability",
    "METRICS": "metrics", "MetricDef": "metrics", "STANDARD_SUITE": "metrics",
    "get_metric": "metrics", "metric_names": "metrics",
}


def __getattr__(name: str):
    if name in _WHERE:
        module = importlib.import_module(f"{__name__}.{_WHERE[name]}")
        return getattr(module, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__():
    return sorted(list(globals()) + __all__)


class _EnginePackage(types.ModuleType):
    """Keeps ``ledger.engine.measure`` the function although a submodule has that name.

    Importing the submodule ``ledger.engine.measure`` makes the import system set the
    package attribute ``measure`` to the module; that one assignment is ignored here so that
    ``from ledger.engine import measure`` always gives the function.  The module itself
    stays reachable as ``sys.modules["ledger.engine.measure"]``.
    """

    def __setattr__(self, name, value):
        if name == "measure" and isinstance(value, types.ModuleType):
            return
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _EnginePackage
