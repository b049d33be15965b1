"""Numeric engine: loop assembly, stability, kernels, metric catalogue and ``measure``.

Importing this package is cheap: python-control is only imported when a name below that
needs it is first used, or when a measurement runs.  The package imports the family driver
(:mod:`ledger.engine.measuring`, whose top level imports only numpy, the catalogue, the
result types and ``ledger.systems.variants``) to register it under its public name
``ledger.engine.measure``; see the comment below.
"""

from __future__ import annotations

import importlib
import sys

from . import measuring as _measuring

__all__ = ["measure", "measure_family", "Measurement", "FamilyResult", "MetricResult",
           "ENGINE_VERSION", "fingerprint", "request_key", "LoopSpec", "Assembly", "assemble",
           "stability", "StabilityReport", "METRICS", "MetricDef", "STANDARD_SUITE",
           "get_metric", "metric_names"]

# The driver module's file is ``measuring.py``; it is registered under its public dotted name
# ``ledger.engine.measure`` before anything can import that name.  An import of a name already
# in ``sys.modules`` never sets the package attribute, so ``ledger.engine.measure`` (the
# package attribute, served by ``__getattr__`` below) stays the function while
# ``import ledger.engine.measure`` / ``from ledger.engine.measure import measure_family`` give
# the module.  ``measuring`` imports nothing heavy at its top level (python-control, the
# kernels and the loop assembly are imported when a measurement runs).
sys.modules.setdefault(f"{__name__}.measure", _measuring)

_WHERE = {
    "measure": "measuring", "measure_family": "measuring", "Measurement": "measuring",
    "FamilyResult": "measuring", "MetricResult": "measuring", "ENGINE_VERSION": "measuring",
    "fingerprint": "measuring", "request_key": "measuring",
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
