"""``loopledger ui``: the ledger in the terminal UI (Textual is imported only when it runs)."""

from __future__ import annotations

from typing import Optional

import typer

from .common import errors_to_exit, open_ledger

__all__ = ["commands", "ui_cmd"]

#: top-level commands (``ui``), added to the root by ``ledger/cli/__init__.py``
commands = typer.Typer()


@commands.command("ui")
@errors_to_exit
def ui_cmd(ledger: Optional[str] = typer.Argument(
        None, help="Ledger file or URL (default: --db, $LOOPLEDGER_DB or ./loopledger.db).")):
    """Open the ledger in the terminal UI: lineage, matrix, requirement detail, diff,
    plots, and a form to add revisions ('?' lists every key)."""
    from ..tui import run_ui

    if ledger is None:
        with open_ledger() as lg:
            run_ui(ledger=lg)
    else:
        from ..api import open_ledger as open_named

        with open_named(ledger) as lg:
            run_ui(ledger=lg)
