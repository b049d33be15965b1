"""``loopledger export-matrix``: the verification matrix as CSV, JSON, XLSX, HTML, JUnit XML
or ReqIF."""

from __future__ import annotations

from pathlib import Path
from typing import List, Optional

import typer

from ..errors import UsageError
from .common import CAUTION, errors_to_exit, open_ledger
from .output import say

__all__ = ["commands", "export_matrix_cmd"]

#: top-level commands (``export-matrix``), added to the root by ``ledger/cli/__init__.py``
commands = typer.Typer()


def revision_selection(loop: str | None, revision: list[str] | None, every: bool):
    if revision:
        if every:
            raise UsageError("give either --revision or --all, not both")
        out = []
        for item in revision:
            if ":" not in item:
                raise UsageError(f"--revision {item!r} must look like LOOP:LABEL")
            lname, label = item.split(":", 1)
            if loop is not None and lname != loop:
                raise UsageError(f"--revision {item!r} is not on loop {loop!r}")
            out.append((lname.strip(), label.strip()))
        return out
    return "all" if every else "tips"


@commands.command("export-matrix")
@errors_to_exit
def export_matrix_cmd(
    path: Path = typer.Argument(..., help="File to write; the suffix picks the format "
                                "(.csv .json .xlsx .html .xml for JUnit, .reqif)."),
    fmt: Optional[str] = typer.Option(None, "--format", help="csv, json, xlsx, html, "
                                      "junit or reqif (default: from the suffix)."),
    loop: Optional[str] = typer.Option(None, "--loop", help="Only this loop."),
    revision: Optional[List[str]] = typer.Option(
        None, "--revision", metavar="LOOP:LABEL", help="A revision column (repeatable); "
        "default: each loop's tip."),
    every: bool = typer.Option(False, "--all", help="Every revision of the selected loops."),
    title: str = typer.Option("Verification matrix", "--title", help="Document title."),
    stale_as_skipped: bool = typer.Option(
        False, "--stale-as-skipped", help="JUnit only: write stale and unverified results "
        "as skipped (the older behaviour) instead of failures 'stale, run verify'."),
):
    """Write the verification matrix (requirements x revisions, with verdicts, values,
    headroom and worst variants) as CSV, JSON, XLSX, an HTML report, JUnit XML or ReqIF."""
    from ..exports import export_matrix, format_for
    from ..exports.rows import VERDICT_ORDER
    from ..history.matrix import build_matrix

    f = format_for(path, fmt)
    if stale_as_skipped and f != "junit":
        raise UsageError(f"--stale-as-skipped applies to the JUnit export only, not {f}")
    sel = revision_selection(loop, revision, every)
    with open_ledger() as lg:
        m = build_matrix(lg, sel, loop=loop, title=title)
        if not m.columns:
            raise UsageError("nothing to export: no revisions match; record one or "
                             "change --loop/--revision")
        written = export_matrix(m, path, f, ledger=lg, stale_as_skipped=stale_as_skipped)
    counts = m.counts()
    summary = ", ".join(f"{counts[v]} {v}" for v in VERDICT_ORDER if counts.get(v))
    cols = ", ".join(f"{c.loop}/{c.label}" for c in m.columns)
    typer.echo(f"wrote {written} ({f}): {len(m.entries)} entries over {cols}"
               + (f"; {summary}" if summary else ""))
    say(CAUTION)
