"""``loopledger init`` (create or upgrade a ledger), ``import`` and ``export`` (spec files)."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from .common import errors_to_exit, open_ledger, state
from .revisions import verify_cmd

__all__ = ["commands", "init_cmd", "import_cmd", "export_cmd"]

#: top-level commands (``init``, ``import``, ``export``), added to the root by
#: ``ledger/cli/__init__.py``
commands = typer.Typer()


@commands.command("init")
@errors_to_exit
def init_cmd(path: Optional[str] = typer.Argument(None, help="Ledger file or URL to create.")):
    """Create a new ledger (or upgrade an older one) at PATH."""
    from ..api import open_ledger as open_named

    state.init = path
    with open_named(path or state.db, create=True) as lg:
        typer.echo(f"ledger {lg.schema_action}: {lg.display_url}")


@commands.command("import")
@errors_to_exit
def import_cmd(spec: Path = typer.Argument(..., help="Spec file (TOML) to import."),
               no_verify: bool = typer.Option(False, "--no-verify", help="Record only; verify later.")):
    """Import plants, loops, requirements and revisions from a spec file (idempotent), then
    verify what is missing."""
    from ..spec import import_spec

    with open_ledger(create=True) as lg:
        rep = import_spec(lg, spec)
        for line in rep.created:
            typer.echo(f"created   {line}")
        for line in rep.new_versions:
            typer.echo(f"new       {line}")
        for loop, label in rep.revisions_added:
            typer.echo(f"recorded  revision {loop}/{label}")
        typer.echo(f"unchanged {len(rep.unchanged)} record(s)")
    if not no_verify:
        verify_cmd(loop=None, tips=False, workers=0, cluster=None)


@commands.command("export")
@errors_to_exit
def export_cmd(spec: Path = typer.Argument(..., help="Spec file (TOML) to write.")):
    """Write the ledger's plants, loops, requirements and revisions as a spec file (and each
    bench measurement as a file in <SPEC stem>-measured/ beside it)."""
    from ..spec import export_spec

    with open_ledger() as lg:
        export_spec(lg, spec)
        typer.echo(f"wrote {spec}")
