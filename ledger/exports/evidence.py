"""Curves behind a matrix entry: see :mod:`ledger.curves` (their home, shared with the UI).

This module keeps the names importable from ``ledger.exports.evidence``.
"""

from ..curves import ColumnCurves, FreqCurves, StepCurves, column_curves  # noqa: F401

__all__ = ["StepCurves", "FreqCurves", "ColumnCurves", "column_curves"]
