"""CLI commands for the ui area, registered on the main app by ``ledger.cli``."""

from __future__ import annotations


def register(app, tools) -> None:
    """Add this area's commands to app.  tools gives the shared CLI helpers:
    tools.open(), tools.run(fn), tools.emit_json(obj), tools.table(cols, rows),
    tools.print_results(results, title), tools.caution."""
