"""``loopledger gate``: exit 0 only when every applicable requirement on the chosen revisions
passes (or is explicitly excluded); otherwise one line per offending cell and exit 1."""

from __future__ import annotations

from typing import List, Optional

import typer

from ..errors import UsageError
from .common import JSON_OPTION, emit_json, errors_to_exit, open_ledger

__all__ = ["commands", "gate_cmd", "EXIT_GATE_FAILS"]

#: top-level commands (``gate``), added to the root by ``ledger/cli/__init__.py``
commands = typer.Typer()

#: exit status when some cell offends
EXIT_GATE_FAILS = 1


@commands.command("gate")
@errors_to_exit
def gate_cmd(
    loop: Optional[str] = typer.Option(None, "--loop", help="Only this loop."),
    revision: Optional[List[str]] = typer.Option(
        None, "--revision", metavar="LOOP:LABEL", help="A revision to check (repeatable); "
        "default: each loop's tip."),
    every: bool = typer.Option(False, "--all", help="Every revision of the selected loops."),
    exclude: Optional[List[str]] = typer.Option(
        None, "--exclude", metavar="ID", help="Leave this requirement out, explicitly "
        "(repeatable); listed in the output."),
    as_json: bool = JSON_OPTION,
):
    """Exit 0 only when every applicable requirement on the chosen revisions passes.

    Failing, error, stale (judged on an older requirement or plant version, or by another engine version) and unverified
    cells each print one line (requirement, revision, state, value, limit) and the exit status
    is 1.  For CI jobs and scripts that want a yes or no."""
    from ..history.gate import gate
    from .exports import revision_selection

    if revision and every:
        raise UsageError("give either --revision or --all, not both")
    sel = revision_selection(loop, revision, every)
    with open_ledger() as lg:
        rep = gate(lg, sel, loop=loop, exclude=exclude or ())
    if not rep.revisions:
        raise UsageError("nothing to check: no revisions match; record one or change "
                         "--loop/--revision")
    if as_json:
        emit_json({"ok": rep.ok, "revisions": list(rep.revisions), "cells": rep.cells,
                   "passing": rep.passing, "excluded": list(rep.excluded),
                   "offending": [c.__dict__ for c in rep.offending]})
    else:
        for c in rep.offending:
            typer.echo(f"{c.requirement} {c.loop}/{c.revision} {c.state} value {c.value} "
                       f"limit {c.limit}" + (f" ({c.reason})" if c.reason else ""))
        tail = f"; excluded: {', '.join(rep.excluded)}" if rep.excluded else ""
        verdict = "holds" if rep.ok else "fails"
        typer.echo(f"gate {verdict}: {rep.passing} of {rep.cells} cell(s) pass on "
                   f"{', '.join(rep.revisions)}" + tail)
    if not rep.ok:
        raise typer.Exit(EXIT_GATE_FAILS)
