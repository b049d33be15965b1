"""CLI commands for the ui area, registered on the main app by ``ledger.cli``."""

from __future__ import annotations

from typing import Optional

import typer

__all__ = ["register"]


def register(app, tools) -> None:
    """Add ``loopledger ui [LEDGER]`` to app.  tools gives the shared CLI helpers."""

    @app.command("ui")
    def ui_cmd(ledger: Optional[str] = typer.Argument(
            None, help="Ledger file or URL (default: --db, $LOOPLEDGER_DB or ./loopledger.db).")):
        """Open the ledger in the terminal UI: lineage, matrix, requirement detail, diff,
        plots, and a form to add revisions ('?' lists every key)."""
        def body():
            from .tui import run_ui

            if ledger is None:
                with tools.open() as lg:
                    run_ui(ledger=lg)
            else:
                from .api import open_ledger

                with open_ledger(ledger) as lg:
                    run_ui(ledger=lg)
        tools.run(body)
