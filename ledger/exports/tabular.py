"""CSV and JSON exports of the verification matrix (layout in docs/exports.md).

CSV: one preamble line (a CSV record of three fields: the schema, ``generated <ISO time>``, the
caution; never more than one physical line), then a header row of
:data:`~ledger.exports.rows.COLUMNS` and one row per matrix entry.  Readers skip exactly one
line (``pandas.read_csv(path, skiprows=1)``); no comment character is involved, so a ``#`` in a
field is data.  Numbers are written exactly (``repr``), missing ones as empty fields,
infinities as ``inf``/``-inf``.

JSON: one object with a ``schema`` field, the name of its JSON Schema (``json_schema``, the
file ``ledger/schemas/loopledger-matrix-2.schema.json`` in the package), the caution, the
generation time, the revision columns, counts by verdict and one record per entry.  Infinities are the strings
``"inf"``/``"-inf"``, missing numbers ``null``; NaN never appears.
"""

from __future__ import annotations

import csv
import json
from dataclasses import asdict
from pathlib import Path

from ..text import cell_safe
from .rows import (COLUMNS, JSON_SCHEMA_NAME, SCHEMA_VERSION, matrix_rows, number_text,
                   verdict_counts, write_atomic)

__all__ = ["export_csv", "export_json", "matrix_document"]


def _csv_cell(name: str, value) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return number_text(value)
    return cell_safe(str(value))  # NUL, ESC... of hostile stored text as \uXXXX (text.py)


def export_csv(matrix, path) -> Path:
    """Write the matrix as CSV (UTF-8, comma separated, one preamble line first).

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
            w = csv.writer(fh)
            # one physical line whatever the text: whitespace runs (newlines) become spaces
            w.writerow([SCHEMA_VERSION, f"generated {matrix.generated_at.isoformat()}",
                        " ".join(matrix.caution.split())])
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


def _revision_entry(c) -> dict:
    """A revision of the document: who, when, hash, the controller and, on digital loops,
    its method, number format and the discrete controller verified (docs/digital.md)."""
    out = {"loop": c.loop, "revision": c.label, "author": c.author,
           "created_at": c.created_at.isoformat(), "content_hash": c.content_hash,
           "controller": c.controller}
    for key, value in (("discretization", c.discretization), ("number_format", c.number_format),
                       ("verified_controller", c.verified)):
        if value:
            out[key] = value
    return out


def matrix_document(matrix) -> dict:
    """The JSON document of a matrix as plain Python data (what :func:`export_json` writes)."""
    rows = matrix_rows(matrix)
    return {
        "schema": SCHEMA_VERSION,
        "json_schema": JSON_SCHEMA_NAME,
        "title": matrix.title,
        "generated_at": matrix.generated_at.isoformat(),
        "caution": matrix.caution,
        "revisions": [_revision_entry(c) for c in matrix.columns],
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
