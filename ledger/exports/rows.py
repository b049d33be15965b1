"""Flat rows of a verification matrix: the one record layout every export writes.

Each :class:`MatrixEntry` becomes one :class:`ExportRow` holding the requirement (ID, version,
statement, method, limit), the result the ledger holds (value with unit, headroom, verdict,
worst variant) and where it came from (loop, revision, plant version, time, engine version).
Nothing is recomputed here: values and verdicts are the ledger's own.

Also holds the small helpers every writer shares: number formatting with infinities as the
strings ``"inf"``/``"-inf"`` (never NaN), and an atomic file write (temp file + rename).
"""

from __future__ import annotations

import math
import os
import tempfile
from dataclasses import dataclass, fields
from pathlib import Path
from typing import Callable

from ..fileio import write_atomic  # noqa: F401 - re-exported for the exporters
from ..errors import ComputeError, UsageError
from ..judge import MATRIX_VERDICTS, count_verdicts

__all__ = ["require", "SCHEMA_VERSION", "JSON_SCHEMA_NAME", "json_schema_path", "COLUMNS", "VERDICT_ORDER", "ExportRow", "matrix_rows",
           "number_text", "parse_number", "write_atomic", "write_xml", "verdict_counts"]

#: Version of the CSV/JSON record layout (docs/exports.md); bump on any incompatible change.
SCHEMA_VERSION = "loopledger-matrix/2"

#: The JSON Schema of the JSON export, shipped in the package (``ledger/schemas/``).
JSON_SCHEMA_NAME = "loopledger-matrix-2.schema.json"


def json_schema_path() -> Path:
    """Path of the JSON Schema file the JSON export names (inside the installed package)."""
    return Path(__file__).resolve().parents[1] / "schemas" / JSON_SCHEMA_NAME

#: Verdict words in the order summaries list them.
VERDICT_ORDER = MATRIX_VERDICTS


@dataclass(frozen=True)
class ExportRow:
    """One (requirement, revision) cell of the matrix, flattened.

    Attributes
    ----------
    requirement : str
        Requirement ID.
    version : int
        Latest requirement version (the one the matrix shows).
    judged_version : int or None
        Requirement version the result judged (older than ``version`` when stale).
    title, statement, method, status, metric : str
    limit : str
        Limit as written, with its unit, e.g. ``">= 45 deg"``.
    value : float or None
        Worst-case value over the plant family, in ``unit``; ``inf``/``-inf`` allowed.
    unit : str
        Unit of ``value`` and ``headroom``.
    headroom : float or None
        Signed distance from the limit, in ``unit``, positive on the passing side.
    value_shown, headroom_shown : str
        ``value`` and ``headroom`` as shown to a person: in the limit's unit, with the
        configured significant digits (``ledger.display``); e.g. ``145.1 ms``, ``+2.1 dB``.
    headroom_fraction : float or None
        Headroom divided by ``|limit|``, dimensionless.
    verdict : str
        ``pass``, ``fail``, ``error``, ``stale`` or ``unverified``.
    worst_variant : str
        Plant variant that produced ``value``.
    worst_measured : bool
        ``worst_variant`` is a measured member (``measured:<name>``; docs/measured.md).
    pass_fraction : float or None
        Fraction of the family's variants that pass, 0..1.
    variants : int or None
        Number of plant variants judged.
    measured_members : str
        The measured members among them, comma separated (``""`` when none).
    loop, revision : str
    plant_version : int or None
    verified_at : str
        ISO 8601 UTC time the result was written ("" when unverified).
    engine_version : str
    reason : str
        Why a result is an error (or an unstable fail); "" otherwise.
    """

    requirement: str
    version: int
    judged_version: int | None
    title: str
    statement: str
    method: str
    status: str
    metric: str
    limit: str
    value: float | None
    unit: str
    headroom: float | None
    headroom_fraction: float | None
    value_shown: str
    headroom_shown: str
    verdict: str
    worst_variant: str
    worst_measured: bool
    pass_fraction: float | None
    variants: int | None
    measured_members: str
    loop: str
    revision: str
    plant_version: int | None
    verified_at: str
    engine_version: str
    reason: str


#: Column names, in file order.
COLUMNS = tuple(f.name for f in fields(ExportRow))

_NUMERIC = {"value", "headroom", "headroom_fraction", "pass_fraction"}
_INTEGER = {"version", "judged_version", "variants", "plant_version"}


def _finite_or_inf(x) -> float | None:
    if x is None:
        return None
    x = float(x)
    if math.isnan(x):
        raise ComputeError("a result holds NaN; re-verify the revision to replace it")
    return x


def require(module: str):
    """Import an optional export dependency, or say how to install it."""
    import importlib

    try:
        return importlib.import_module(module)
    except ImportError as e:
        raise UsageError(f"this export needs the Python package {module.split('.')[0]!r}; "
                          "install the extra: pip install 'loopledger[export]'") from e


def matrix_rows(matrix) -> list[ExportRow]:
    """One :class:`ExportRow` per matrix entry, in the matrix's order.

    Parameters
    ----------
    matrix : ledger.history.matrix.Matrix
    """
    from ..display import headroom_text, value_text

    out = []
    measured = getattr(matrix, "measured", {}) or {}
    for e in matrix.entries:
        q, r = e.requirement, e.result
        members = measured.get((e.loop, r.plant_version), ()) if r else ()
        out.append(ExportRow(
            requirement=q.key, version=q.version,
            judged_version=r.requirement_version if r else None,
            title=q.title, statement=q.statement, method=q.method, status=q.status,
            metric=q.metric or "", limit=q.limit_text,
            value=_finite_or_inf(r.value) if r else None,
            unit=(r.unit if r else q.unit) or "",
            headroom=_finite_or_inf(r.headroom) if r else None,
            headroom_fraction=_finite_or_inf(r.headroom_fraction) if r else None,
            value_shown=value_text(r.value, r.unit, q.limit_text) if r and r.value is not None
            else "",
            headroom_shown=headroom_text(r.value, r.headroom, r.headroom_fraction, r.unit,
                                         q.limit_text) if r and r.headroom is not None else "",
            verdict=e.verdict, worst_variant=r.worst_variant if r else "",
            worst_measured=bool(r and r.worst_variant in members),
            pass_fraction=_finite_or_inf(r.pass_fraction) if r else None,
            variants=r.variants if r else None, measured_members=", ".join(members),
            loop=e.loop, revision=e.revision.label,
            plant_version=r.plant_version if r else None,
            verified_at=r.created_at.isoformat() if r else "",
            engine_version=r.engine_version if r else "", reason=r.reason if r else "",
        ))
    return out


def verdict_counts(rows, loop: str | None = None) -> dict[str, int]:
    """Number of rows per verdict word (every word of :data:`VERDICT_ORDER` present)."""
    return count_verdicts((r for r in rows if loop is None or r.loop == loop), VERDICT_ORDER)


def number_text(x: float | None, *, digits: int = 17) -> str:
    """Text of a number for files: ``""`` for None, ``"inf"``/``"-inf"``, else ``repr``-exact
    (``digits=17`` round-trips a float; fewer for display)."""
    if x is None:
        return ""
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    if digits >= 17:
        return repr(float(x))
    return f"{x:.{digits}g}"


def parse_number(text: str) -> float | None:
    """Inverse of :func:`number_text`."""
    if text is None or text == "":
        return None
    return float(text)




def write_xml(tree, path) -> Path:
    """Write an lxml element tree as indented UTF-8 XML, atomically."""
    return write_atomic(path, lambda tmp: tree.write(str(tmp), xml_declaration=True,
                                                     encoding="UTF-8", pretty_print=True))
