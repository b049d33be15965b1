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
from ..judge import MATRIX_VERDICTS

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
    samples, sample_passes : int or None
        Random samples in the family and how many pass (``None`` without random samples).
    yield_bound : float or None
        One-sided Clopper-Pearson lower confidence bound on the samples' pass probability,
        0..1, at ``yield_confidence`` (``None`` without random samples: a bound means
        something for random draws only, not for corners).
    yield_confidence : float or None
        Confidence of the bound (the requirement's setting, 0.95 by default).
    yield_target : float or None
        The requirement's yield target; with one the verdict is judged on the bound.
    samples_needed : int or None
        Passing samples, none failing, that support the yield target at its confidence.
    yield_shown : str
        The bound as shown to a person, e.g. ``98.9 % at 95 %``, or ``no samples``.
    loop, revision : str
    plant_version : int or None
    verified_at : str
        ISO 8601 UTC time the result was written ("" when unverified).
    engine_version : str
    reason : str
        Why a result is an error (or an unstable fail); "" otherwise.
    state : str
        What the cell shows: ``verdict``, or ``waived`` for a ``fail`` or ``error`` a live
        waiver covers (never ``pass``; ``verdict`` keeps the judged verdict).
    waiver : int or None
        Id of that waiver (``loopledger waiver list``).
    waiver_reason, waiver_approver, waiver_role, waiver_expires, waiver_condition : str
        The waiver's reason, approver and role, last day it counts (``YYYY-MM-DD``) and
        free-text condition; "" when the cell is not waived (or the waiver has none).
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
    samples: int | None
    sample_passes: int | None
    yield_bound: float | None
    yield_confidence: float | None
    yield_target: float | None
    samples_needed: int | None
    yield_shown: str
    loop: str
    revision: str
    plant_version: int | None
    verified_at: str
    engine_version: str
    reason: str
    state: str = ""
    waiver: int | None = None
    waiver_reason: str = ""
    waiver_approver: str = ""
    waiver_role: str = ""
    waiver_expires: str = ""
    waiver_condition: str = ""


#: Column names, in file order.
COLUMNS = tuple(f.name for f in fields(ExportRow))

_NUMERIC = {"value", "headroom", "headroom_fraction", "pass_fraction", "yield_bound",
            "yield_confidence", "yield_target"}
_INTEGER = {"version", "judged_version", "variants", "plant_version", "waiver", "samples",
            "sample_passes", "samples_needed"}


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
    from ..yieldbound import DEFAULT_CONFIDENCE, bound_text, samples_needed

    out = []
    measured = getattr(matrix, "measured", {}) or {}
    for e in matrix.entries:
        q, r = e.requirement, e.result
        conf = r.confidence if r else (q.confidence or DEFAULT_CONFIDENCE)
        target = r.yield_target if r else q.yield_target
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
            samples=r.samples if r else None,
            sample_passes=r.sample_passes if r else None,
            yield_bound=r.yield_bound if r else None, yield_confidence=conf,
            yield_target=target,
            samples_needed=samples_needed(target, conf) if target else None,
            yield_shown=bound_text(r) if r else "",
            loop=e.loop, revision=e.revision.label,
            plant_version=r.plant_version if r else None,
            verified_at=r.created_at.isoformat() if r else "",
            engine_version=r.engine_version if r else "", reason=r.reason if r else "",
            state=e.state, **_waiver_fields(e.waiver),
        ))
    return out


def _waiver_fields(w) -> dict:
    if w is None:
        return {}
    return {"waiver": w.id, "waiver_reason": w.reason, "waiver_approver": w.approver,
            "waiver_role": w.role, "waiver_expires": w.expires_on or "",
            "waiver_condition": w.condition}


def verdict_counts(rows, loop: str | None = None) -> dict[str, int]:
    """Number of rows per shown state: every verdict word of :data:`VERDICT_ORDER` (0 when
    none), then ``waived`` (a fail or error a live waiver covers, not counted under its
    verdict) when there are any."""
    out = {w: 0 for w in VERDICT_ORDER}
    for r in rows:
        if loop is None or r.loop == loop:
            k = r.state or r.verdict
            out[k] = out.get(k, 0) + 1
    return out


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
