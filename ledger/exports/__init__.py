"""Exports of the verification matrix: CSV, JSON, XLSX, HTML report, JUnit XML, ReqIF.

Every export reads one :class:`~ledger.history.matrix.Matrix` (build it with
:func:`ledger.history.matrix.build_matrix`), carries the matrix's caution, and is written
atomically (temporary file in the target folder, then one rename).  Formats and schemas are
described in docs/exports.md.
"""

from __future__ import annotations

from pathlib import Path

from ..errors import UsageError
from .junit import export_junit
from .reqif import export_reqif
from .rows import COLUMNS, JSON_SCHEMA_NAME, SCHEMA_VERSION, ExportRow, json_schema_path, matrix_rows
from .tabular import export_csv, export_json
from .workbook import export_xlsx

__all__ = ["FORMATS", "SUFFIXES", "format_for", "export_matrix", "export_csv", "export_json",
           "export_xlsx", "export_html", "export_junit", "export_reqif", "matrix_rows",
           "ExportRow", "COLUMNS", "SCHEMA_VERSION", "JSON_SCHEMA_NAME", "json_schema_path"]

#: Format names.
FORMATS = ("csv", "json", "xlsx", "html", "junit", "reqif")

#: File suffix -> format name.
SUFFIXES = {".csv": "csv", ".json": "json", ".xlsx": "xlsx", ".html": "html", ".htm": "html",
            ".xml": "junit", ".reqif": "reqif"}


def export_html(matrix, path, lg) -> Path:
    """Write the HTML report; see :func:`ledger.exports.html.export_html`."""
    from .html import export_html as _export_html

    return _export_html(matrix, path, lg)


def format_for(path, fmt: str | None = None) -> str:
    """The format name for ``path``: ``fmt`` when given, else from the suffix.

    Raises
    ------
    UsageError
        Unknown format or suffix.
    """
    if fmt is not None:
        f = fmt.lower()
        if f not in FORMATS:
            raise UsageError(f"unknown export format {fmt!r}; use one of {', '.join(FORMATS)}")
        return f
    suffix = Path(path).suffix.lower()
    if suffix not in SUFFIXES:
        raise UsageError(f"cannot tell the format from {Path(path).name!r}; use a suffix of "
                          f"{', '.join(sorted(SUFFIXES))} or give the format")
    return SUFFIXES[suffix]


def export_matrix(matrix, path, fmt: str | None = None, *, ledger=None,
                  stale_as_skipped: bool = False) -> Path:
    """Write ``matrix`` to ``path`` in one format.

    Parameters
    ----------
    matrix : ledger.history.matrix.Matrix
    path : str or Path
    fmt : str, optional
        One of :data:`FORMATS`; default from the suffix (``.csv .json .xlsx .html .xml``
        (JUnit) ``.reqif``).
    ledger : Ledger, optional
        The ledger the matrix came from; required for ``html`` (the curves are rebuilt from
        the revisions).
    stale_as_skipped : bool
        JUnit only: write stale and unverified entries as ``<skipped>`` (the older behaviour)
        instead of failures (the default).

    Returns
    -------
    Path
        Absolute path written.

    Raises
    ------
    UsageError
        Unknown format, HTML without ``ledger``, or ``stale_as_skipped`` for another format.
    """
    f = format_for(path, fmt)
    if stale_as_skipped and f != "junit":
        raise UsageError(f"stale_as_skipped applies to the JUnit export only, not {f}")
    if f == "junit":
        return export_junit(matrix, path, stale_as_skipped=stale_as_skipped)
    if f == "html":
        if ledger is None:
            raise UsageError("the HTML report needs the ledger to draw its curves; pass "
                              "ledger=lg")
        return export_html(matrix, path, ledger)
    return {"csv": export_csv, "json": export_json, "xlsx": export_xlsx,
            "junit": export_junit, "reqif": export_reqif}[f](matrix, path)
