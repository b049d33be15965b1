"""CSV and JSON exports of the verification matrix (layout in docs/exports.md).

CSV: three comment lines starting with ``#`` (schema, generation time, caution), then a header
row of :data:`~ledger.exports.rows.COLUMNS` and one row per matrix entry.  Numbers are written
exactly (``repr``), missing ones as empty fields, infinities as ``inf``/``-inf``.

JSON: one object with a ``schema`` field, the caution, the generation time, the revision
columns, counts by verdict and one record per entry.  Infinities are the strings
``"inf"``/``"-inf"``, missing numbers ``null``; NaN never appears.
"""

from __future__ import annotations

import csv
import json
from dataclasses import asdict
from pathlib import Path

from ..text import cell_safe
from .rows import (COLUMNS, SCHEMA_VERSION, matrix_rows, number_text, verdict_counts,
                   write_atomic)

__all__ = ["export_csv", "export_json", "matrix_document"]


def _csv_cell(name: str, value) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return number_text(value)
    return cell_safe(str(value))  # NUL, ESC... of hostile stored text as \uXXXX (text.py)


def export_csv(matrix, path) -> Path:
    """Write the matrix as CSV (UTF-8, comma separated, ``#`` comment lines first).

    Parameters
    ----------
    matrix : ledger.history.matrix.Matrix
    path : str or Path

    Returns
    -------
    Path
        Absolute path written.
    """
    rows = matrix_rows(matrix)

    def write(tmp: Path) -> None:
        with tmp.open("w", newline="", encoding="utf-8") as fh:
            fh.write(f"# schema: {SCHEMA_VERSION}\n")
            fh.write(f"# generated: {matrix.generated_at.isoformat()}\n")
            fh.write(f"# caution: {' '.join(matrix.caution.split())}\n")
            w = csv.writer(fh)
            w.writerow(COLUMNS)
            for r in rows:
                d = asdict(r)
                w.writerow([_csv_cell(c, d[c]) for c in COLUMNS])

    return write_atomic(path, write)


def _json_value(value):
    if isinstance(value, float):
        text = number_text(value)
        return text if text in ("inf", "-inf") else value
    return value


def matrix_document(matrix) -> dict:
    """The JSON document of a matrix as plain Python data (what :func:`export_json` writes)."""
    rows = matrix_rows(matrix)
    return {
        "schema": SCHEMA_VERSION,
        "title": matrix.title,
        "generated_at": matrix.generated_at.isoformat(),
        "caution": matrix.caution,
        "revisions": [{"loop": c.loop, "revision": c.label, "author": c.author,
                       "created_at": c.created_at.isoformat(), "content_hash": c.content_hash}
                      for c in matrix.columns],
        "counts": verdict_counts(rows),
        "rows": [{k: _json_value(v) for k, v in asdict(r).items()} for r in rows],
    }


def export_json(matrix, path) -> Path:
    """Write the matrix as one JSON document (UTF-8, indented; schema in docs/exports.md).

    Parameters
    ----------
    matrix : ledger.history.matrix.Matrix
    path : str or Path

    Returns
    -------
    Path
    """
    doc = matrix_document(matrix)

    def write(tmp: Path) -> None:
        tmp.write_text(json.dumps(doc, indent=2, ensure_ascii=False, allow_nan=False) + "\n",
                       encoding="utf-8")

    return write_atomic(path, write)
