"""loopledger: a design-requirements ledger for feedback-control loops.

Public API (imported lazily, so that ``import ledger`` stays cheap):

* :func:`open_ledger` — open or create a ledger (``ledger.api``);
* :func:`measure` — database-free metric evaluation (``ledger.engine.measure``);
* the error classes in :mod:`ledger.errors`.
"""

from __future__ import annotations

import importlib

from .errors import (
    ComputeError,
    DuplicateError,
    IntegrityViolation,
    LedgerError,
    ModelError,
    ModelSyntaxError,
    NotFoundError,
    SchemaError,
    SpecError,
    UnitError,
    UnstableLoopError,
)

__version__ = "0.1.0"

__all__ = [
    "open_ledger", "Ledger", "measure", "measure_family", "Measurement", "LoopSpec",
    "PlantFamily", "Variant", "parse_model", "build_family", "build_matrix", "diff",
    "first_failing", "build_trace", "export_matrix", "create_baseline", "sign_baseline", "audit_ledger",
    "worst_case_drivers",
    "LedgerError", "ModelSyntaxError", "ModelError", "UnitError", "SpecError", "NotFoundError",
    "DuplicateError", "IntegrityViolation", "SchemaError", "ComputeError", "UnstableLoopError",
]

_LAZY = {
    "open_ledger": "ledger.api", "Ledger": "ledger.api",
    "measure": "ledger.engine.measure", "measure_family": "ledger.engine.measure",
    "Measurement": "ledger.engine.measure", "LoopSpec": "ledger.engine.loop",
    "PlantFamily": "ledger.systems.variants", "Variant": "ledger.systems.variants",
    "parse_model": "ledger.systems", "build_family": "ledger.systems",
    "build_matrix": "ledger.history.matrix", "diff": "ledger.history.diff",
    "first_failing": "ledger.history.since", "build_trace": "ledger.history.trace",
    "export_matrix": "ledger.exports", "create_baseline": "ledger.signoff",
    "sign_baseline": "ledger.signoff",
    "worst_case_drivers": "ledger.verification.drivers",
}
#: public name -> (module, attribute) where the two differ (``ledger.audit`` is a module)
_RENAMED = {"audit_ledger": ("ledger.audit", "audit")}


def __getattr__(name: str):
    if name in _LAZY:
        return getattr(importlib.import_module(_LAZY[name]), name)
    if name in _RENAMED:
        mod, attr = _RENAMED[name]
        return getattr(importlib.import_module(mod), attr)
    raise AttributeError(f"module 'ledger' has no attribute {name!r}")


def __dir__():
    return sorted(list(globals()) + __all__)
